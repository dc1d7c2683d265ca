//! The offline subcommands of `probity`. Each module holds one command's arguments and a thin `run`; the shared
//! CSV scoring pipeline is in [`pipeline`].

pub mod calibrate;
pub mod check;
pub mod compare;
pub mod demo;
pub mod demo_data;
pub mod explain;
pub mod pipeline;
pub mod promote;
pub mod reliability;
pub mod report;
pub mod score;

/// Said once at the end of every human-readable report (demo, report, compare, calibrate).
pub const CAUTIONS: &str =
    "Probabilities are decision support; thresholds and adverse-action duties follow local \
law and licensed practice; re-validate a model before using it on a new population.";
