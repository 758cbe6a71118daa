//! The klgauge binary: parses arguments, calls the library, prints, and
//! turns the outcome into SPEC's exit code. All work happens in the library.

use clap::{Args, Parser, Subcommand};
use klgauge::commands::compare::{compare, compare_shard, CompareArgs};
use klgauge::commands::merge::{merge, MergeArgs};
use klgauge::error::Error;
use klgauge::report::{text::Text, Format, GateLimits};
use std::io::{IsTerminal, Write};
use std::path::PathBuf;
use std::process::ExitCode;

#[derive(Parser)]
#[command(
    name = "klgauge",
    version,
    about = "How far a compressed language model's next-token distribution moved from the original's"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Exact metrics of each candidate against the reference, estimators, worst positions, gates
    Compare(CompareCli),
    /// Sampled estimators k1, k2, k3 from per-token log-probabilities (logprob_ref, logprob_cand)
    Estimate(EstimateCli),
    /// Tensors, dtypes, shapes, layout problems and the storage-dtype floor of a file
    Inspect(InspectCli),
    /// Combine the partial results of a sharded run (`compare --shard I/N --partial FILE`) into one report
    Merge(MergeCli),
    /// Make an invented example scenario (the fictional model Wren-7 and two compressed variants) and compare it, writing every report
    Demo(DemoCli),
}

#[derive(Args)]
struct DemoCli {
    /// Directory for the generated logit files and the reports
    #[arg(long, default_value = "demo/out", value_name = "DIR")]
    out: PathBuf,
    /// Worker threads (default: one per core)
    #[arg(long, value_name = "N")]
    threads: Option<usize>,
}

#[derive(Args)]
struct EstimateCli {
    /// A safetensors file with `logprob_ref`, `logprob_cand` (F32 [n]) and optionally `prompt_offsets`
    file: PathBuf,
    /// Write the estimates as JSON
    #[arg(long, value_name = "FILE")]
    json: Option<PathBuf>,
    /// Report in bits instead of nats
    #[arg(long)]
    bits: bool,
}

#[derive(Args)]
struct InspectCli {
    /// A logit file (safetensors file or directory of shards) or a log-probability file
    file: PathBuf,
    /// Write the findings as JSON
    #[arg(long, value_name = "FILE")]
    json: Option<PathBuf>,
}

#[derive(Args)]
struct MergeCli {
    /// Partial results, one per shard, in any order
    #[arg(required = true, value_name = "PARTIAL")]
    partials: Vec<PathBuf>,
    /// Write the full report as JSON
    #[arg(long, value_name = "FILE")]
    json: Option<PathBuf>,
    /// Write a self-contained HTML report
    #[arg(long, value_name = "FILE")]
    html: Option<PathBuf>,
    /// Number of worst positions and prompts listed (default: what the shards kept)
    #[arg(long, value_name = "N")]
    top: Option<usize>,
    /// A tokenizer.json, to show token text
    #[arg(long, value_name = "FILE")]
    tokenizer: Option<PathBuf>,
    /// Report divergences and entropies in bits instead of nats
    #[arg(long)]
    bits: bool,
    #[command(flatten)]
    gates: GateCli,
}

#[derive(Args)]
struct CompareCli {
    /// Reference logit file (safetensors file or directory of shards)
    reference: PathBuf,
    /// Candidate logit files, compared one by one with the reference
    #[arg(required = true)]
    candidates: Vec<PathBuf>,
    /// Write the full report as JSON
    #[arg(long, value_name = "FILE")]
    json: Option<PathBuf>,
    /// Write one line per counted position
    #[arg(long, value_name = "FILE")]
    csv: Option<PathBuf>,
    /// Write a self-contained HTML report
    #[arg(long, value_name = "FILE")]
    html: Option<PathBuf>,
    /// Number of worst positions and prompts listed
    #[arg(long, default_value_t = 20, value_name = "N")]
    top: usize,
    /// A tokenizer.json, to show token text
    #[arg(long, value_name = "FILE")]
    tokenizer: Option<PathBuf>,
    /// Draws per position for the sampled estimators, e.g. 1,4,16 (0 = none)
    #[arg(
        long,
        value_delimiter = ',',
        default_value = "1,4,16",
        value_name = "N[,N...]"
    )]
    samples: Vec<usize>,
    /// Seed of the estimator draws
    #[arg(long, default_value_t = 0, value_name = "S")]
    seed: u64,
    /// Worker threads (default: one per core)
    #[arg(long, value_name = "N")]
    threads: Option<usize>,
    /// Compare only the first N columns of each file (both renormalised)
    #[arg(long, value_name = "N")]
    vocab: Option<usize>,
    /// Also compute the Jensen-Shannon divergence
    #[arg(long)]
    js: bool,
    /// Report divergences and entropies in bits instead of nats
    #[arg(long)]
    bits: bool,
    /// Process only shard I of N (0-based), for cluster runs; needs --partial
    #[arg(long, value_name = "I/N")]
    shard: Option<String>,
    /// Where a shard run writes its partial result
    #[arg(long, value_name = "FILE")]
    partial: Option<PathBuf>,
    #[command(flatten)]
    gates: GateCli,
}

/// Most draws per position `--samples` accepts.
const MAX_SAMPLES: usize = 1 << 20;

/// The release gates, shared by `compare` and `merge`.
#[derive(Args)]
struct GateCli {
    /// Gate: fail when the mean kl exceeds X (in the report's units)
    #[arg(long, value_name = "X")]
    max_kl_mean: Option<f64>,
    /// Gate: fail when the 99th percentile of kl exceeds X
    #[arg(long, value_name = "X")]
    max_kl_p99: Option<f64>,
    /// Gate: fail when top-1 agreement falls below X (a fraction, 0..1)
    #[arg(long, value_name = "X")]
    min_top1: Option<f64>,
}

impl GateCli {
    fn limits(&self) -> GateLimits {
        GateLimits {
            max_kl_mean: self.max_kl_mean,
            max_kl_p99: self.max_kl_p99,
            min_top1: self.min_top1,
        }
    }
}

fn parse_shard(s: &str) -> Result<(usize, usize), Error> {
    let bad = || {
        Error::usage(format!(
            "--shard {s}: expected I/N with 0 <= I < N, e.g. 0/8"
        ))
    };
    let (i, n) = s.split_once('/').ok_or_else(bad)?;
    let (i, n): (usize, usize) = (
        i.trim().parse().map_err(|_| bad())?,
        n.trim().parse().map_err(|_| bad())?,
    );
    if n == 0 || i >= n {
        return Err(bad());
    }
    Ok((i, n))
}

/// Prints to stdout; a closed pipe (`| head`) is not an error worth a word.
fn print(report: &klgauge::report::Report) -> Result<(), Error> {
    print_with(|out| Text.write(report, out))
}

fn print_with(f: impl FnOnce(&mut dyn Write) -> std::io::Result<()>) -> Result<(), Error> {
    let mut out = std::io::stdout().lock();
    match f(&mut out).and_then(|_| out.flush()) {
        Ok(()) => Ok(()),
        Err(e) if e.kind() == std::io::ErrorKind::BrokenPipe => Ok(()),
        Err(e) => Err(Error::output(std::path::Path::new("<stdout>"), e)),
    }
}

/// On SIGINT, SIGTERM or SIGHUP: remove every half-written report and exit
/// with 128 + the signal number (130 for Ctrl-C), the shell convention.
#[cfg(unix)]
fn install_interrupt_handler() {
    use signal_hook::consts::{SIGHUP, SIGINT, SIGTERM};
    let Ok(mut signals) = signal_hook::iterator::Signals::new([SIGINT, SIGTERM, SIGHUP]) else {
        return;
    };
    let _ = std::thread::Builder::new()
        .name("interrupt".into())
        .spawn(move || {
            if let Some(sig) = signals.forever().next() {
                klgauge::output::abandon_all();
                let _ = writeln!(std::io::stderr(), "klgauge: interrupted, no report written");
                std::process::exit(128 + sig);
            }
        });
}

#[cfg(not(unix))]
fn install_interrupt_handler() {}

fn print_text(s: &str) -> Result<(), Error> {
    let mut out = std::io::stdout().lock();
    match out.write_all(s.as_bytes()).and_then(|_| out.flush()) {
        Ok(()) => Ok(()),
        Err(e) if e.kind() == std::io::ErrorKind::BrokenPipe => Ok(()),
        Err(e) => Err(Error::output(std::path::Path::new("<stdout>"), e)),
    }
}

fn run(cli: Cli) -> Result<ExitCode, Error> {
    match cli.command {
        Command::Compare(c) => {
            let outputs: Vec<&std::path::Path> = [&c.json, &c.csv, &c.html, &c.partial]
                .into_iter()
                .flatten()
                .map(|p| p.as_path())
                .collect();
            let inputs: Vec<&std::path::Path> = std::iter::once(&c.reference)
                .chain(&c.candidates)
                .chain(&c.tokenizer)
                .map(|p| p.as_path())
                .collect();
            klgauge::output::check_destinations(&outputs, &inputs)?;
            // Every worker keeps its draws in memory: an absurd count would end
            // in an allocation failure (an abort), not in a clear message.
            if let Some(n) = c.samples.iter().find(|&&n| n > MAX_SAMPLES) {
                return Err(Error::usage(format!(
                    "--samples {n}: at most {MAX_SAMPLES} draws per position"
                )));
            }
            let args = CompareArgs {
                reference: c.reference,
                candidates: c.candidates,
                json: c.json,
                csv: c.csv,
                html: c.html,
                top: c.top,
                tokenizer: c.tokenizer,
                samples: c.samples,
                seed: c.seed,
                threads: c.threads,
                vocab: c.vocab,
                js: c.js,
                bits: c.bits,
                shard: c.shard.as_deref().map(parse_shard).transpose()?,
                partial: c.partial,
                gates: c.gates.limits(),
                progress: std::io::stderr().is_terminal(),
            };
            if args.shard.is_some() || args.partial.is_some() {
                let shard = compare_shard(&args)?;
                print_text(&shard.summary())?;
                return Ok(ExitCode::from(0));
            }
            let outcome = compare(&args)?;
            print(&outcome.report)?;
            Ok(ExitCode::from(if outcome.gate_failed { 1 } else { 0 }))
        }
        Command::Estimate(c) => {
            use klgauge::commands::estimate::{estimate, write_text, EstimateArgs};
            klgauge::output::check_destinations(
                &c.json.iter().map(|p| p.as_path()).collect::<Vec<_>>(),
                &[c.file.as_path()],
            )?;
            let r = estimate(&EstimateArgs {
                file: c.file,
                json: c.json,
                bits: c.bits,
            })?;
            print_with(|out| write_text(&r, out))?;
            Ok(ExitCode::SUCCESS)
        }
        Command::Inspect(c) => {
            use klgauge::commands::inspect::{inspect, write_text, InspectArgs};
            klgauge::output::check_destinations(
                &c.json.iter().map(|p| p.as_path()).collect::<Vec<_>>(),
                &[c.file.as_path()],
            )?;
            let r = inspect(&InspectArgs {
                file: c.file,
                json: c.json,
            })?;
            print_with(|out| write_text(&r, out))?;
            Ok(ExitCode::SUCCESS)
        }
        Command::Demo(d) => {
            print_text(&klgauge::demo::preface())?;
            let (files, outcome) = klgauge::demo::run(&d.out, d.threads)?;
            print(&outcome.report)?;
            let dir = files.dir.display();
            print_text(&format!(
                "\nwrote {dir}/report.html, {dir}/report.json and {dir}/positions.csv (open the HTML file in a browser)\n\
                 the same comparison as a command, which exits {} because a gate {}:\n  {}\n",
                if outcome.gate_failed { 1 } else { 0 },
                if outcome.gate_failed { "failed" } else { "did not fail" },
                klgauge::demo::compare_command(&files)
            ))?;
            // The demo ran as designed whatever the verdicts: exit 0.
            Ok(ExitCode::SUCCESS)
        }
        Command::Merge(m) => {
            let outputs: Vec<&std::path::Path> = [&m.json, &m.html]
                .into_iter()
                .flatten()
                .map(|p| p.as_path())
                .collect();
            let inputs: Vec<&std::path::Path> = m
                .partials
                .iter()
                .chain(&m.tokenizer)
                .map(|p| p.as_path())
                .collect();
            klgauge::output::check_destinations(&outputs, &inputs)?;
            let args = MergeArgs {
                partials: m.partials,
                json: m.json,
                html: m.html,
                top: m.top,
                tokenizer: m.tokenizer,
                bits: m.bits,
                gates: m.gates.limits(),
            };
            let outcome = merge(&args)?;
            print(&outcome.report)?;
            Ok(ExitCode::from(if outcome.gate_failed { 1 } else { 0 }))
        }
    }
}

fn main() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            // --help and --version are not errors.
            let code = if e.use_stderr() { 2 } else { 0 };
            let _ = e.print();
            return ExitCode::from(code);
        }
    };
    install_interrupt_handler();
    match run(cli) {
        Ok(code) => code,
        Err(e) => {
            klgauge::output::remove_temps();
            // Not eprintln!: it panics when stderr is closed.
            let _ = writeln!(std::io::stderr(), "klgauge: error: {e}");
            ExitCode::from(e.exit_code() as u8)
        }
    }
}
