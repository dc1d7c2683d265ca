//! The probity service crate as a library, so that the binary and the integration tests build the server the
//! same way. [`serve`] is the gRPC scoring service (`probity serve`).

pub mod serve;
