//! A NATS server with JetStream on loopback, started as a child process: for the tests and
//! for `csgate bench --broker`, never for production (run the server as a service there).
//!
//! It runs `nats-server -js -a 127.0.0.1 -p <free port> -sd <folder>` (Debian's package puts
//! the binary in /usr/sbin), waits until the port accepts connections and JetStream answers,
//! and kills the server when dropped.

use std::net::{Ipv4Addr, SocketAddr, TcpListener, TcpStream};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::Duration;

/// Where to look for the server binary: `$CSGATE_NATS_SERVER`, then the `PATH`, then the
/// Debian package's place.
pub fn find_binary() -> Option<PathBuf> {
    if let Some(p) = std::env::var_os("CSGATE_NATS_SERVER") {
        return Some(PathBuf::from(p));
    }
    let in_path = std::env::var_os("PATH").and_then(|paths| {
        std::env::split_paths(&paths)
            .map(|d| d.join("nats-server"))
            .find(|p| p.is_file())
    });
    in_path.or_else(|| {
        ["/usr/sbin/nats-server", "/usr/bin/nats-server"]
            .iter()
            .map(PathBuf::from)
            .find(|p| p.is_file())
    })
}

/// A free TCP port on loopback (bound and released; the usual test idiom).
pub fn free_port() -> std::io::Result<u16> {
    Ok(TcpListener::bind((Ipv4Addr::LOCALHOST, 0))?
        .local_addr()?
        .port())
}

/// A running server; killed on drop.
#[derive(Debug)]
pub struct LocalServer {
    child: Child,
    port: u16,
}

impl LocalServer {
    /// Starts `binary` with JetStream storage in `store` (created if missing) and waits up to
    /// ten seconds for it to listen.
    pub fn start(binary: &Path, store: &Path) -> std::io::Result<LocalServer> {
        std::fs::create_dir_all(store)?;
        let port = free_port()?;
        let child = Command::new(binary)
            .args(["-js", "-a", "127.0.0.1", "-p", &port.to_string(), "-sd"])
            .arg(store)
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()?;
        let mut server = LocalServer { child, port };
        let addr = SocketAddr::from((Ipv4Addr::LOCALHOST, port));
        for _ in 0..200 {
            if TcpStream::connect_timeout(&addr, Duration::from_millis(100)).is_ok() {
                return Ok(server);
            }
            if let Some(status) = server.child.try_wait()? {
                return Err(std::io::Error::other(format!(
                    "nats-server exited at start: {status}"
                )));
            }
            std::thread::sleep(Duration::from_millis(50));
        }
        Err(std::io::Error::other(
            "nats-server did not listen within 10 s",
        ))
    }

    /// The client URL.
    pub fn url(&self) -> String {
        format!("nats://127.0.0.1:{}", self.port)
    }
}

impl Drop for LocalServer {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}
