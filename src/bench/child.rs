//! A `lineside serve` child process for `lineside bench` and the benchmarks: started on a free
//! loopback port, polled until ready, killed when dropped.

use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use anyhow::Context as _;

use super::load::Target;

/// A `lineside serve` child process; killed when dropped.
pub struct ChildServer {
    child: Child,
    /// The loopback port it listens on.
    pub port: u16,
}

impl Drop for ChildServer {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

impl ChildServer {
    /// Start `lineside serve` (this executable, or `exe`) on a free loopback port with the
    /// config and extra flags, and wait until `/readyz` answers 200 (at most 180 s).
    ///
    /// # Errors
    /// When it cannot start, exits early, or is not ready in time.
    pub fn start(config: Option<&Path>, batching: &[String]) -> anyhow::Result<ChildServer> {
        let exe = std::env::current_exe().context("cannot find the lineside executable to start the server")?;
        Self::start_exe(&exe, config, batching)
    }

    /// As [`ChildServer::start`], with the `lineside` executable at `exe`.
    ///
    /// # Errors
    /// As [`ChildServer::start`].
    pub fn start_exe(exe: &Path, config: Option<&Path>, batching: &[String]) -> anyhow::Result<ChildServer> {
        // A free port: bind, read, release (the child binds it a moment later).
        let port = std::net::TcpListener::bind("127.0.0.1:0")?.local_addr()?.port();
        let mut cmd = Command::new(exe);
        cmd.args(["--log-level", "warn", "serve", "--listen", &format!("127.0.0.1:{port}")]);
        if let Some(c) = config {
            cmd.arg("--config").arg(c);
        }
        cmd.args(batching).stdout(Stdio::null());
        let child = cmd.spawn().context("cannot start `lineside serve`")?;
        let mut server = ChildServer { child, port };
        server.wait_ready()?;
        Ok(server)
    }

    fn wait_ready(&mut self) -> anyhow::Result<()> {
        let started = Instant::now();
        while started.elapsed() < Duration::from_secs(180) {
            if let Some(status) = self.child.try_wait()? {
                anyhow::bail!("`lineside serve` exited with {status} before it was ready (its log is above)");
            }
            if let Ok(mut s) = std::net::TcpStream::connect(("127.0.0.1", self.port)) {
                use std::io::{Read, Write};
                let _ = s.set_read_timeout(Some(Duration::from_secs(2)));
                let _ = s.write_all(b"GET /readyz HTTP/1.1\r\nHost: localhost\r\nConnection: close\r\n\r\n");
                let mut head = [0u8; 12];
                if s.read_exact(&mut head).is_ok() && &head[9..12] == b"200" {
                    return Ok(());
                }
            }
            std::thread::sleep(Duration::from_millis(100));
        }
        anyhow::bail!("`lineside serve` was not ready after 180 s (see /readyz)")
    }

    /// The process id, for its CPU time.
    pub fn pid(&self) -> String {
        self.child.id().to_string()
    }

    /// Its resident memory in MB ([`rss_kb`]).
    pub fn rss_mb(&self) -> f64 {
        rss_kb(self.child.id()) as f64 / 1024.0
    }

    /// Where to post frames for `model`.
    pub fn target(&self, model: &str) -> Target {
        Target {
            addr: ([127, 0, 0, 1], self.port).into(),
            host: format!("127.0.0.1:{}", self.port),
            path: format!("/classify/{model}"),
        }
    }

    /// The server's root URL.
    pub fn url(&self) -> String {
        format!("http://127.0.0.1:{}", self.port)
    }
}

/// Resident memory of process `pid` in kB (`VmRSS` of /proc/PID/status, proc(5)); 0 when
/// it cannot be read.
pub fn rss_kb(pid: u32) -> u64 {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).unwrap_or_default();
    let line = status.lines().find(|l| l.starts_with("VmRSS:")).unwrap_or_default();
    line.split_whitespace().nth(1).and_then(|v| v.parse().ok()).unwrap_or(0)
}

/// Open file descriptors of process `pid` (entries of /proc/PID/fd, proc(5)); 0 when they
/// cannot be read.
pub fn open_fds(pid: u32) -> usize {
    std::fs::read_dir(format!("/proc/{pid}/fd")).map(|d| d.count()).unwrap_or(0)
}
