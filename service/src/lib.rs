//! The probity service crate as a library, so that the binary and the integration tests build the server the
//! same way. [`serve`] is the gRPC scoring service (`probity serve`); [`store`] the prediction store and outcome
//! matching; [`report`] the exact reports from the log; [`client`] how the command-line tools dial a server.
#![warn(clippy::unwrap_used, clippy::expect_used)]

pub mod charts;
pub mod client;
pub mod compare;
pub mod report;
pub mod serve;
pub mod store;
