//! The connection limit of the gRPC port (`limits.max_connections`): each accepted connection holds a slot until
//! it closes; a connection accepted with no slot free is closed at once, counted in
//! `probity_connections_refused_total` and logged at a bounded rate, so a client sees the refusal at once (and may
//! try another replica) instead of waiting in the listen queue. `probity_connections_open` is the number held.
//!
//! With `limits.max_streams_per_connection` (HTTP/2 SETTINGS_MAX_CONCURRENT_STREAMS) and HTTP/2's flow-control
//! windows this bounds what clients can make the server hold: docs/limits.md gives the sum.

use std::io;
use std::pin::Pin;
use std::sync::Arc;
use std::task::{Context, Poll};
use std::time::Duration;

use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::{mpsc, watch, OwnedSemaphorePermit, Semaphore};
use tokio_stream::wrappers::ReceiverStream;

use crate::serve::metrics;
use crate::serve::refusals::Throttle;

static REFUSED: Throttle = Throttle::new("connection refused: limits.max_connections are open");

/// The slots of the gRPC port's connections.
pub struct Gate {
    slots: Arc<Semaphore>,
}

/// One connection's slot; dropping it frees the slot.
pub struct Slot {
    _permit: OwnedSemaphorePermit,
}

impl Drop for Slot {
    fn drop(&mut self) {
        metrics::connection_closed();
    }
}

impl Gate {
    /// A gate of `max` slots.
    pub fn new(max: usize) -> Arc<Gate> {
        // Both series exist from the start, so a rate or an alert on them needs no first refusal.
        metrics::connections_start();
        Arc::new(Gate {
            slots: Arc::new(Semaphore::new(max)),
        })
    }

    /// A slot for a connection just accepted, or `None` (counted and logged) when every slot is taken.
    pub fn admit(&self) -> Option<Slot> {
        match Arc::clone(&self.slots).try_acquire_owned() {
            Ok(permit) => {
                metrics::connection_opened();
                Some(Slot { _permit: permit })
            }
            Err(_) => {
                metrics::connection_refused();
                if let Some(unlogged) = REFUSED.admit("", "") {
                    tracing::warn!(unlogged_since_last = unlogged, "{}", REFUSED.what());
                }
                None
            }
        }
    }
}

/// A connection with its slot.
pub struct Admitted<T> {
    io: T,
    _slot: Slot,
}

impl<T> Admitted<T> {
    /// `io` holding `slot` until it is dropped.
    pub fn new(io: T, slot: Slot) -> Admitted<T> {
        Admitted { io, _slot: slot }
    }
}

impl<T: tonic::transport::server::Connected> tonic::transport::server::Connected for Admitted<T> {
    type ConnectInfo = T::ConnectInfo;

    fn connect_info(&self) -> T::ConnectInfo {
        self.io.connect_info()
    }
}

impl<T: AsyncRead + Unpin> AsyncRead for Admitted<T> {
    fn poll_read(
        self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &mut ReadBuf<'_>,
    ) -> Poll<io::Result<()>> {
        Pin::new(&mut self.get_mut().io).poll_read(cx, buf)
    }
}

impl<T: AsyncWrite + Unpin> AsyncWrite for Admitted<T> {
    fn poll_write(
        self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &[u8],
    ) -> Poll<io::Result<usize>> {
        Pin::new(&mut self.get_mut().io).poll_write(cx, buf)
    }

    fn poll_write_vectored(
        self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        bufs: &[io::IoSlice<'_>],
    ) -> Poll<io::Result<usize>> {
        Pin::new(&mut self.get_mut().io).poll_write_vectored(cx, bufs)
    }

    fn is_write_vectored(&self) -> bool {
        self.io.is_write_vectored()
    }

    fn poll_flush(self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.get_mut().io).poll_flush(cx)
    }

    fn poll_shutdown(self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.get_mut().io).poll_shutdown(cx)
    }
}

/// Accepts a TCP connection on `listener` (waiting a little after an error such as running out of file
/// descriptors, instead of spinning) with its slot; connections over the limit are closed here. `None` at
/// shutdown.
pub async fn accept(
    listener: &TcpListener,
    gate: &Gate,
    shutdown: &mut watch::Receiver<bool>,
) -> Option<(TcpStream, std::net::SocketAddr, Slot)> {
    loop {
        let accepted = tokio::select! {
            _ = shutdown.wait_for(|stop| *stop) => return None,
            accepted = listener.accept() => accepted,
        };
        let (tcp, remote) = match accepted {
            Ok(pair) => pair,
            Err(error) => {
                tracing::warn!(%error, "gRPC accept failed");
                tokio::time::sleep(Duration::from_millis(50)).await;
                continue;
            }
        };
        // Over the limit: dropping the stream closes it.
        let Some(slot) = gate.admit() else { continue };
        let _ = tcp.set_nodelay(true);
        return Some((tcp, remote, slot));
    }
}

/// The plaintext connections of the gRPC port, each holding its slot.
pub fn plain_incoming(
    listener: TcpListener,
    gate: Arc<Gate>,
    mut shutdown: watch::Receiver<bool>,
) -> ReceiverStream<io::Result<Admitted<TcpStream>>> {
    let (tx, rx) = mpsc::channel(64);
    tokio::spawn(async move {
        while let Some((tcp, _, slot)) = accept(&listener, &gate, &mut shutdown).await {
            if tx.send(Ok(Admitted::new(tcp, slot))).await.is_err() {
                break;
            }
        }
    });
    ReceiverStream::new(rx)
}
