//! The offline subcommands of `probity`. Each module holds one command's arguments and a thin `run`.

pub mod demo_data;
