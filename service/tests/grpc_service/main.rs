//! Integration tests of the gRPC service through a real tonic client over loopback TCP: every RPC, a table of bad
//! requests, hot reload under load, and the monitoring endpoint. One test binary; the server is built by the same
//! `probity::serve::start` that `probity serve` uses, bound to 127.0.0.1:0.

#![allow(clippy::unwrap_used)] // tests may unwrap (team rules); helpers outside #[test] fns need the allowance

mod bad_requests;
mod fixtures;
mod metrics;
mod reload;
mod rpcs;
