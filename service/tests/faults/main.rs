//! Faults of the prediction store under a serving server: a full disk, a read-only data directory, a stalled
//! writer, and an outcome flood for unknown prediction ids. DEVELOPERS.md ("Prediction store") documents the
//! behaviour each test checks.
//!
//! The full-disk and read-only tests mount a tmpfs in a private mount namespace (`unshare --mount`), which needs
//! root or CAP_SYS_ADMIN. Where that is impossible they fail with a message saying so; a developer without root
//! may set `PROBITY_SKIP_MOUNT_TESTS=1` to skip them explicitly (CI never does).

#![allow(clippy::unwrap_used)]

mod common;
mod full_disk;
mod outcome_flood;
mod read_only;
mod stalled_writer;
