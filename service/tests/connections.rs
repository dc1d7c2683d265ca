//! The gRPC port's connections, seen from a bare HTTP/2 client.
//!
//! `server.max_connection_age_ms`: past the age the server ends an HTTP/2 connection with GOAWAY (RFC 9113,
//! section 6.8, frame type 0x7) and closes it once no call is in flight (here: none), so a client reconnects and, behind a
//! connection-level balancer, may land on another replica. Without the key a connection stays open.
//!
//! `limits.max_connections`: a connection over the limit is closed at once, before any HTTP/2 frame, and one
//! closing frees its slot; `limits.max_streams_per_connection` is announced in the server's first SETTINGS frame
//! (SETTINGS_MAX_CONCURRENT_STREAMS, RFC 9113 section 6.5.2, identifier 0x3), so a client never opens more.
//!
//! The client side here is a bare TCP connection speaking the HTTP/2 frame layer (RFC 9113, sections 3.4 and 4.1:
//! the connection preface, then 9-byte frame headers), so what is observed is the server's own frames.

#![allow(clippy::unwrap_used)]

use std::io::{ErrorKind, Read, Write};
use std::net::TcpStream;
use std::time::{Duration, Instant};

#[path = "support/serve.rs"]
mod serve;

struct Server {
    /// Killed with SIGKILL when the handle drops.
    _process: serve::Spawned,
    port: u16,
    _dir: tempfile::TempDir,
}

fn start(max_connection_age_ms: u64) -> Server {
    start_with(max_connection_age_ms, "")
}

/// A server with `limits` (TOML lines of the `[limits]` table).
fn start_with(max_connection_age_ms: u64, limits: &str) -> Server {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(
        dir.path().join("m.json"),
        r#"{"format": "probity.model", "format_version": 1, "name": "m", "version": "1",
            "features": [{"name": "x", "type": "numeric"}], "margin_scale": "log_odds", "base_rate": 0.5,
            "linear": {"intercept": 0.0, "terms": [{"numeric": {"feature": 0, "coefficient": 1.0}}]}}"#,
    )
    .unwrap();
    let config = dir.path().join("probity.toml");
    std::fs::write(
        &config,
        format!(
            "[server]\nplaintext = \"loopback\"\nshutdown_grace_ms = 500\n\
             max_connection_age_ms = {max_connection_age_ms}\n\
             [limits]\n{limits}\n\
             [models]\ndirectory = {}\nwatch = false\n[routes.r]\nmodel = \"m\"\n",
            toml::Value::from(dir.path().display().to_string())
        ),
    )
    .unwrap();
    let process = serve::Spawned::start(&config, &[]);
    Server {
        port: process.grpc.port(),
        _process: process,
        _dir: dir,
    }
}

/// What the server sent on one HTTP/2 connection within `watch`: the time of its GOAWAY frame, if any, and
/// whether it closed the connection after it.
fn watch_connection(port: u16, watch: Duration) -> (Option<Duration>, bool) {
    let mut s = TcpStream::connect(("127.0.0.1", port)).unwrap();
    let opened = Instant::now();
    s.write_all(b"PRI * HTTP/2.0\r\n\r\nSM\r\n\r\n").unwrap();
    s.write_all(&[0, 0, 0, 0x4, 0, 0, 0, 0, 0]).unwrap(); // an empty SETTINGS frame
    s.set_read_timeout(Some(Duration::from_millis(100)))
        .unwrap();
    let mut buf = Vec::new();
    let mut goaway = None;
    let mut settings_acked = false;
    while opened.elapsed() < watch {
        let mut chunk = [0u8; 4096];
        match s.read(&mut chunk) {
            Ok(0) => return (goaway, true),
            Ok(n) => buf.extend_from_slice(&chunk[..n]),
            Err(e) if matches!(e.kind(), ErrorKind::WouldBlock | ErrorKind::TimedOut) => continue,
            Err(_) => return (goaway, true),
        }
        // Whole frames: 3-byte length, type, flags, 4-byte stream id, then the payload.
        while buf.len() >= 9 {
            let len = usize::from(buf[0]) << 16 | usize::from(buf[1]) << 8 | usize::from(buf[2]);
            if buf.len() < 9 + len {
                break;
            }
            let (kind, flags) = (buf[3], buf[4]);
            if kind == 0x4 && flags & 0x1 == 0 && !settings_acked {
                s.write_all(&[0, 0, 0, 0x4, 0x1, 0, 0, 0, 0]).unwrap(); // SETTINGS ACK
                settings_acked = true;
            }
            if kind == 0x6 && flags & 0x1 == 0 && len == 8 {
                // PING: answered with a PING ACK carrying the same 8 bytes (the server's graceful close waits for it).
                let mut ack = vec![0, 0, 8, 0x6, 0x1, 0, 0, 0, 0];
                ack.extend_from_slice(&buf[9..17]);
                s.write_all(&ack).unwrap();
            }
            if kind == 0x7 && goaway.is_none() {
                goaway = Some(opened.elapsed());
            }
            buf.drain(..9 + len);
        }
    }
    (goaway, false)
}

#[test]
fn a_connection_past_its_age_gets_goaway_and_is_closed() {
    let server = start(1_000);
    let (goaway, closed) = watch_connection(server.port, Duration::from_secs(8));
    let at = goaway.expect("no GOAWAY within 8 s with max_connection_age_ms = 1000");
    assert!(at >= Duration::from_millis(900), "GOAWAY after {at:?}");
    assert!(closed, "the connection was not closed after GOAWAY");
}

#[test]
fn without_the_key_a_connection_stays_open() {
    let server = start(0);
    let (goaway, closed) = watch_connection(server.port, Duration::from_secs(3));
    assert_eq!(goaway, None);
    assert!(!closed);
}

/// Opens a connection, sends the client preface and waits up to 3 s for the server's first SETTINGS frame: its
/// (identifier, value) pairs, or `None` when the server closed the connection first. The stream is kept open.
fn first_settings(port: u16) -> (TcpStream, Option<Vec<(u16, u32)>>) {
    let mut s = TcpStream::connect(("127.0.0.1", port)).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(3))).unwrap();
    // The server may close a refused connection before the preface is written.
    let _ = s.write_all(b"PRI * HTTP/2.0\r\n\r\nSM\r\n\r\n");
    let _ = s.write_all(&[0, 0, 0, 0x4, 0, 0, 0, 0, 0]);
    let mut buf = Vec::new();
    let mut chunk = [0u8; 4096];
    loop {
        if buf.len() >= 9 {
            let len = usize::from(buf[0]) << 16 | usize::from(buf[1]) << 8 | usize::from(buf[2]);
            if buf.len() >= 9 + len {
                assert_eq!(buf[3], 0x4, "the server's first frame is SETTINGS");
                let pairs = buf[9..9 + len]
                    .chunks(6)
                    .map(|p| {
                        (
                            u16::from_be_bytes([p[0], p[1]]),
                            u32::from_be_bytes([p[2], p[3], p[4], p[5]]),
                        )
                    })
                    .collect();
                return (s, Some(pairs));
            }
        }
        match s.read(&mut chunk) {
            Ok(0) => return (s, None),
            Ok(n) => buf.extend_from_slice(&chunk[..n]),
            Err(e) if matches!(e.kind(), ErrorKind::WouldBlock | ErrorKind::TimedOut) => {
                panic!("no SETTINGS and no close within 3 s")
            }
            Err(_) => return (s, None),
        }
    }
}

#[test]
fn the_stream_limit_is_announced_in_settings() {
    let server = start_with(0, "max_streams_per_connection = 7");
    let (_s, settings) = first_settings(server.port);
    let settings = settings.expect("the server closed the connection");
    assert!(settings.contains(&(0x3, 7)), "{settings:?}");

    // The default: 100.
    let server = start(0);
    let (_s, settings) = first_settings(server.port);
    assert!(settings.unwrap().contains(&(0x3, 100)));
}

#[test]
fn a_connection_over_the_limit_is_closed_and_a_closed_one_frees_its_slot() {
    let server = start_with(0, "max_connections = 2");
    let (first, a) = first_settings(server.port);
    let (_second, b) = first_settings(server.port);
    assert!(a.is_some() && b.is_some());
    let (_, third) = first_settings(server.port);
    assert_eq!(
        third, None,
        "a third connection was served with max_connections = 2"
    );
    drop(first);
    // The server notices the close when it reads; the slot is back within moments.
    let deadline = Instant::now() + Duration::from_secs(5);
    loop {
        let (_s, again) = first_settings(server.port);
        if again.is_some() {
            break;
        }
        assert!(
            Instant::now() < deadline,
            "the closed connection's slot was not freed"
        );
        std::thread::sleep(Duration::from_millis(50));
    }
}
