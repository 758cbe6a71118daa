//! Token text from a tokenizer.json (the file format of Hugging Face
//! tokenizers), read with serde_json: only the vocabulary is needed.

use crate::error::{Error, Result};
use std::collections::HashMap;
use std::path::Path;

#[derive(Debug, Default)]
pub struct Vocabulary {
    text: HashMap<u32, String>,
}

impl Vocabulary {
    pub fn load(path: &Path) -> Result<Vocabulary> {
        let bytes = std::fs::read(path)
            .map_err(|e| Error::input(path, format!("cannot read tokenizer: {e}")))?;
        let v: serde_json::Value = serde_json::from_slice(&bytes)
            .map_err(|e| Error::input(path, format!("tokenizer is not JSON: {e}")))?;
        let mut text = HashMap::new();
        match v.pointer("/model/vocab") {
            Some(serde_json::Value::Object(m)) => {
                for (k, id) in m {
                    if let Some(id) = id.as_u64() {
                        text.insert(id as u32, k.clone());
                    }
                }
            }
            // Unigram models store [piece, score] pairs in id order.
            Some(serde_json::Value::Array(a)) => {
                for (id, e) in a.iter().enumerate() {
                    if let Some(s) = e.get(0).and_then(|s| s.as_str()) {
                        text.insert(id as u32, s.to_string());
                    }
                }
            }
            _ => return Err(Error::input(path, "tokenizer has no model.vocab")),
        }
        if let Some(serde_json::Value::Array(a)) = v.get("added_tokens") {
            for t in a {
                if let (Some(id), Some(c)) = (
                    t.get("id").and_then(|x| x.as_u64()),
                    t.get("content").and_then(|x| x.as_str()),
                ) {
                    text.insert(id as u32, c.to_string());
                }
            }
        }
        Ok(Vocabulary { text })
    }

    /// Readable text of a token: byte-level markers become the characters they
    /// stand for, and control characters are escaped.
    pub fn text(&self, id: u32) -> Option<String> {
        self.text.get(&id).map(|s| readable(s))
    }
}

/// GPT-2-style byte-level tokenizers map bytes to printable code points
/// (space -> U+0120 'Ġ', newline -> U+010A 'Ċ'); SentencePiece uses U+2581 for
/// a space. Undo both, then escape what a terminal or table cannot show.
pub fn readable(s: &str) -> String {
    let mut bytes = Vec::new();
    let mut plain = String::new();
    let mut is_byte_level = true;
    for ch in s.chars() {
        match byte_level_decode(ch) {
            Some(b) => bytes.push(b),
            None => {
                is_byte_level = false;
                break;
            }
        }
    }
    let decoded = if is_byte_level {
        String::from_utf8_lossy(&bytes).into_owned()
    } else {
        s.replace('\u{2581}', " ")
    };
    for ch in decoded.chars() {
        match ch {
            '\n' => plain.push_str("\\n"),
            '\t' => plain.push_str("\\t"),
            '\r' => plain.push_str("\\r"),
            c if c.is_control() => plain.push_str(&format!("\\x{:02x}", c as u32)),
            c => plain.push(c),
        }
    }
    plain
}

/// The inverse of the GPT-2 byte-to-unicode table (printable bytes map to
/// themselves, the other 68 to U+0100 onwards, in byte order).
fn byte_level_decode(ch: char) -> Option<u8> {
    let c = ch as u32;
    let printable =
        |b: u32| (33..=126).contains(&b) || (161..=172).contains(&b) || (174..=255).contains(&b);
    if c < 256 && printable(c) {
        return Some(c as u8);
    }
    if (256..256 + 68).contains(&c) {
        let mut n = 0;
        for b in 0u32..256 {
            if !printable(b) {
                if 256 + n == c {
                    return Some(b as u8);
                }
                n += 1;
            }
        }
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn byte_level_markers_become_text() {
        assert_eq!(readable("\u{0120}hello"), " hello");
        assert_eq!(readable("\u{010A}"), "\\n");
        assert_eq!(readable("\u{2581}world"), " world");
    }
}
