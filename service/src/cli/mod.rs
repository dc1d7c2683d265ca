//! The offline subcommands of `probity`. Each module holds one command's arguments and a thin `run`; the shared
//! CSV scoring pipeline is in [`pipeline`].

pub mod calibrate;
pub mod check;
pub mod compare;
pub mod demo;
pub mod demo_data;
pub mod pipeline;
pub mod promote;
pub mod reliability;
pub mod report;
pub mod score;
