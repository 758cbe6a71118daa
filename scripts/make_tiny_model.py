#!/usr/bin/env python3
"""Build a tiny causal language model and tokenizer, offline, for tests and demos.

    python scripts/make_tiny_model.py OUTDIR [--seed S] [--vocab-size N] [--train-steps N]

Everything is invented: the text is help-desk chatter around "Wren-7", a
fictional assistant model made by the fictional Larkspur Foundry lab and used
by the fictional Tallow & Pike Parcel Lines. The script

  * trains a byte-level BPE tokenizer (the `tokenizers` library) on that text,
  * makes a small Llama-style causal LM (2 layers, hidden 64) whose vocabulary
    is the tokenizer's, with weights drawn under a fixed seed,
  * optionally fits it for a few steps on the same text (--train-steps, default
    0 = keep the random weights), so its next-token distributions are peaked,
  * saves model and tokenizer with save_pretrained, plus OUTDIR/prompts.jsonl
    (invented prompts, one JSON object with a "text" field per line).

Nothing touches the network.
"""
from __future__ import annotations

import argparse
import json
import os
import sys

SENTENCES = [
    "Wren-7 is the help desk assistant of Tallow & Pike Parcel Lines.",
    "Hello, this is Wren-7 at the Tallow & Pike help desk. How can I help you today?",
    "My parcel was due on Tuesday but the tracking page still says it is at the Brackwater depot.",
    "Parcels held at the Brackwater depot are usually released within two working days.",
    "Could you give me the twelve digit tracking code printed under the barcode?",
    "The tracking code is TP-4471-0932-18 and the label says fragile.",
    "Thank you. I can see the parcel left the sorting hall at Ostry Junction this morning.",
    "A driver from the Fennick route will deliver it before six in the evening.",
    "If nobody is at home, the driver leaves a blue card with a pickup code.",
    "You can collect the parcel at any Tallow & Pike counter with the pickup code and a photo card.",
    "I would like to change the delivery address to my office on Corrin Street.",
    "Address changes are possible until the parcel is loaded onto the delivery van.",
    "Your parcel is already on the van, so I cannot change the address any more.",
    "I can ask the driver to leave it with a neighbour or at the Corrin Street locker.",
    "The parcel arrived damaged and the corner of the box was crushed.",
    "I am sorry to hear that. Please send two photos of the box and one of the contents.",
    "Damage claims are answered within five working days by the claims team in Marlow Reach.",
    "How much does it cost to send a small box from Ostry Junction to Harlan Bay?",
    "A small box up to two kilograms costs four pounds twenty with standard delivery.",
    "Express delivery arrives the next working day and costs nine pounds fifty.",
    "Wren-7 cannot see payment card numbers and will never ask for your password.",
    "Wren-7 was trained by Larkspur Foundry to answer questions about parcels and deliveries.",
    "For questions about invoices, Wren-7 hands the chat to a colleague from the billing desk.",
    "The Tallow & Pike counters are open from eight in the morning until seven in the evening.",
    "On public holidays the counters in Harlan Bay and Marlow Reach stay closed.",
    "My customer number is C-20931 and I want to book a collection for tomorrow.",
    "A collection can be booked for tomorrow between nine and one or between one and five.",
    "I have booked the collection between nine and one. The driver will bring a label.",
    "Can I send batteries or perfume with Tallow & Pike?",
    "Loose batteries and perfume count as restricted goods and need the special handling form.",
    "The special handling form is on the counter, or Wren-7 can send it by email.",
    "Where is my refund for the cancelled express delivery?",
    "Refunds go back to the original card within seven working days.",
    "The tracking page shows the status returned to sender. What does that mean?",
    "Returned to sender means the driver tried three times and nobody collected the parcel.",
    "Please check that the house number on the label matches your front door.",
    "The label shows number forty one, but I live at number fourteen.",
    "I have corrected the house number, and the parcel will go out again on Thursday.",
    "Wren-7 speaks English and Welsh and can pass the chat to a person at any time.",
    "Is there anything else I can help you with today?",
    "No, that is all. Thank you for your help, Wren-7.",
    "You are welcome. Have a good evening from everyone at Tallow & Pike.",
    "The Brackwater depot sorts around forty thousand parcels on a busy night.",
    "Heavy parcels over twenty kilograms travel on the freight route through Ostry Junction.",
    "A pallet booking needs the size, the weight and a phone number for the driver.",
    "Wren-7 keeps no memory of a chat once the window is closed.",
]

PROMPTS = [
    "Hello Wren-7, my parcel TP-5520-1187-03 has not arrived yet.",
    "How much does express delivery from Harlan Bay to Marlow Reach cost?",
    "The driver left a blue card but I lost the pickup code.",
    "Can I change the delivery address after the parcel is on the van?",
    "My box arrived crushed and the glass inside is broken. What should I do?",
    "When are the Tallow & Pike counters open on a public holiday?",
    "I want to send a pallet of books from Ostry Junction next Monday.",
    "Why does my tracking page say returned to sender?",
    "Is it allowed to send perfume in a small box?",
    "Please book a collection for my customer number C-44107 tomorrow morning.",
    "Where is my refund for the cancelled collection?",
    "Does Wren-7 remember what I told it in yesterday's chat?",
]


def build_tokenizer(vocab_size: int):
    from tokenizers import Tokenizer, decoders, models, pre_tokenizers, processors, trainers

    tok = Tokenizer(models.BPE())
    tok.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    tok.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(
        vocab_size=vocab_size,
        min_frequency=2,
        special_tokens=["<|bos|>", "<|eos|>", "<|pad|>"],
        initial_alphabet=pre_tokenizers.ByteLevel.alphabet(),
        show_progress=False,
    )
    tok.train_from_iterator(SENTENCES + PROMPTS, trainer=trainer)
    bos = tok.token_to_id("<|bos|>")
    # Every encoded text starts with the begin-of-sequence token, so the first
    # real token of a prompt has a prediction row of its own.
    tok.post_processor = processors.TemplateProcessing(
        single="<|bos|> $A", pair="<|bos|> $A <|bos|> $B", special_tokens=[("<|bos|>", bos)]
    )
    return tok


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("outdir")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--vocab-size", type=int, default=512, help="BPE vocabulary target (default 512)")
    ap.add_argument("--train-steps", type=int, default=0,
                    help="optional Adam steps on the invented text (default 0: random weights)")
    ap.add_argument("--init-std", type=float, default=0.25,
                    help="std of the random weights (default 0.25, larger than usual so that "
                         "untrained next-token distributions are not nearly uniform)")
    args = ap.parse_args(argv)

    import torch
    from transformers import LlamaConfig, LlamaForCausalLM, PreTrainedTokenizerFast

    os.makedirs(args.outdir, exist_ok=True)
    raw = build_tokenizer(args.vocab_size)
    tokenizer = PreTrainedTokenizerFast(
        tokenizer_object=raw, bos_token="<|bos|>", eos_token="<|eos|>", pad_token="<|pad|>"
    )
    tokenizer.save_pretrained(args.outdir)

    torch.manual_seed(args.seed)
    config = LlamaConfig(
        vocab_size=raw.get_vocab_size(),
        hidden_size=64,
        intermediate_size=128,
        num_hidden_layers=2,
        num_attention_heads=4,
        num_key_value_heads=2,
        max_position_embeddings=256,
        initializer_range=args.init_std,
        tie_word_embeddings=False,
        bos_token_id=raw.token_to_id("<|bos|>"),
        eos_token_id=raw.token_to_id("<|eos|>"),
        pad_token_id=raw.token_to_id("<|pad|>"),
    )
    model = LlamaForCausalLM(config)
    model.to(torch.float32)

    if args.train_steps > 0:
        ids = [raw.encode(s).ids + [config.eos_token_id] for s in SENTENCES]
        opt = torch.optim.Adam(model.parameters(), lr=3e-3)
        model.train()
        g = torch.Generator().manual_seed(args.seed)
        for _ in range(args.train_steps):
            batch = [ids[int(i)] for i in torch.randint(len(ids), (8,), generator=g)]
            width = max(len(b) for b in batch)
            x = torch.full((len(batch), width), config.pad_token_id, dtype=torch.long)
            labels = torch.full_like(x, -100)
            att = torch.zeros_like(x)
            for r, b in enumerate(batch):
                x[r, : len(b)] = torch.tensor(b)
                labels[r, : len(b)] = torch.tensor(b)
                att[r, : len(b)] = 1
            loss = model(input_ids=x, attention_mask=att, labels=labels).loss
            opt.zero_grad()
            loss.backward()
            opt.step()
        model.eval()

    model.save_pretrained(args.outdir, safe_serialization=True)
    with open(os.path.join(args.outdir, "prompts.jsonl"), "w", encoding="utf-8") as f:
        for p in PROMPTS:
            f.write(json.dumps({"text": p}) + "\n")
    print(f"tiny model: vocab {config.vocab_size}, {sum(p.numel() for p in model.parameters())} "
          f"parameters, {len(PROMPTS)} prompts -> {args.outdir}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
