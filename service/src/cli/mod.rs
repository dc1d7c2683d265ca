//! The offline subcommands of `probity`. Each module holds one command's arguments and a thin `run`; the shared
//! CSV scoring pipeline is in [`pipeline`].

pub mod calibrate;
pub mod check;
pub mod compare;
pub mod demo;
pub mod demo_data;
pub mod evaluate;
pub mod explain;
pub mod pipeline;
pub mod promote;
pub mod reliability;
pub mod report;
pub mod score;
pub mod send_outcomes;
pub mod when;

/// Said once at the end of every human-readable report (demo, report, compare, calibrate, evaluate).
pub const CAUTIONS: &str =
    "Probabilities are decision support; thresholds and adverse-action duties follow local \
law and licensed practice; re-validate a model before using it on a new population.";

/// Writes `text` to standard output. A reader that has gone (`probity report --json | head`) is no error: the
/// caller stops writing and the command exits quietly (see `main`).
pub fn emit(text: &str) -> std::io::Result<()> {
    use std::io::Write as _;
    let mut out = std::io::stdout().lock();
    out.write_all(text.as_bytes())?;
    out.flush()
}

/// Whether an error chain ends in a closed standard output (the reader of a pipe exited early).
pub fn is_broken_pipe(err: &anyhow::Error) -> bool {
    err.chain().any(|e| {
        e.downcast_ref::<std::io::Error>()
            .is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe)
    })
}
