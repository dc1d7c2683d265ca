//! A PostgreSQL database of a test's own, shared by the test binaries that need one (included with
//! `#[path = "support/postgres.rs"] mod pg;`). The server is the one `.ci/run` checks for: 127.0.0.1:5432 with
//! trust authentication, or the administrative URL in `PROBITY_TEST_POSTGRES`; `PROBITY_SKIP_POSTGRES=1` skips the
//! tests where it is missing.
#![allow(dead_code)] // each including binary uses a part

use probity::store::postgres::{ConnectionUrl, PgStore};

/// The administrative URL test databases are made with.
pub fn admin_url() -> String {
    std::env::var("PROBITY_TEST_POSTGRES")
        .unwrap_or_else(|_| "postgresql://postgres@127.0.0.1:5432/postgres".into())
}

/// A database of the test's own, dropped at the end.
pub struct TestDb {
    pub name: String,
}

impl TestDb {
    /// `None` when PostgreSQL is missing and the run asked to skip it.
    pub fn create(tag: &str) -> Option<TestDb> {
        let mut admin = match postgres::Client::connect(&admin_url(), postgres::NoTls) {
            Ok(c) => c,
            Err(e) => {
                if std::env::var("PROBITY_SKIP_POSTGRES").as_deref() == Ok("1") {
                    eprintln!(
                        "PROBITY_SKIP_POSTGRES=1: skipping, PostgreSQL is not reachable ({e})"
                    );
                    return None;
                }
                panic!(
                    "this test needs PostgreSQL 15 at {} (trust authentication; set PROBITY_TEST_POSTGRES to \
                     another administrative URL, or PROBITY_SKIP_POSTGRES=1 to skip it): {e}",
                    admin_url()
                );
            }
        };
        let nanos = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .unwrap()
            .as_nanos();
        let name = format!(
            "probity_t_{tag}_{}_{}",
            std::process::id(),
            nanos % 1_000_000_000
        );
        admin
            .batch_execute(&format!("CREATE DATABASE {name}"))
            .unwrap();
        Some(TestDb { name })
    }

    /// The database's URL.
    pub fn url(&self) -> String {
        let admin = admin_url();
        let base = admin
            .rsplit_once('/')
            .map_or(admin.as_str(), |(b, _)| b)
            .to_string();
        format!("{base}/{}", self.name)
    }

    /// The store on this database, opened at `now_ms`.
    pub fn open(&self, now_ms: i64) -> PgStore {
        PgStore::open(ConnectionUrl::new(&self.url()).unwrap(), None, now_ms).unwrap()
    }

    /// A plain client of this database.
    pub fn client(&self) -> postgres::Client {
        postgres::Client::connect(&self.url(), postgres::NoTls).unwrap()
    }
}

impl Drop for TestDb {
    fn drop(&mut self) {
        if let Ok(mut admin) = postgres::Client::connect(&admin_url(), postgres::NoTls) {
            let _ = admin.batch_execute(&format!(
                "DROP DATABASE IF EXISTS {} WITH (FORCE)",
                self.name
            ));
        }
    }
}
