//! `convoy serve` as a child process, for tests that need a real process: signals, resident
//! memory, several replicas. Included with `#[path = "support/serve_process.rs"] mod ...;`;
//! each test uses part of it.
#![allow(dead_code)]

use std::ffi::OsStr;
use std::io::{BufRead, BufReader};
use std::net::SocketAddr;
use std::process::{Child, Command, ExitStatus, Stdio};
use std::sync::{Arc, Mutex};
use std::time::Duration;

/// A running `convoy serve`; killed when dropped (a failing test leaves no process behind).
pub struct ServeProcess {
    child: Child,
    /// The gRPC address, as the server reported it.
    pub addr: SocketAddr,
    /// Standard-error lines after the start-up line.
    log: Arc<Mutex<Vec<String>>>,
    reader: Option<std::thread::JoinHandle<()>>,
}

impl ServeProcess {
    /// Starts `convoy serve ARGS` (with `RUST_LOG=log_level`) and waits for its
    /// "convoy: serving ... on ADDR" line. Standard error is read on a thread from then on, so
    /// the child never blocks on a full pipe.
    pub fn start<I, S>(args: I, log_level: &str) -> ServeProcess
    where
        I: IntoIterator<Item = S>,
        S: AsRef<OsStr>,
    {
        let mut child = Command::new(env!("CARGO_BIN_EXE_convoy"))
            .arg("serve")
            .args(args)
            .env("RUST_LOG", log_level)
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .spawn()
            .expect("start convoy serve");
        let stderr = child.stderr.take().expect("piped");
        let log = Arc::new(Mutex::new(Vec::new()));
        let (tx, rx) = std::sync::mpsc::channel();
        let reader = {
            let log = Arc::clone(&log);
            std::thread::spawn(move || {
                let mut tx = Some(tx);
                for line in BufReader::new(stderr).lines().map_while(Result::ok) {
                    if tx.is_some()
                        && let Some(rest) = line.strip_prefix("convoy: serving ")
                        && let Some((_, at)) = rest.split_once(" on ")
                    {
                        let addr = at.split([' ', ';']).next().unwrap_or("").to_string();
                        if let Some(tx) = tx.take() {
                            let _ = tx.send(addr);
                        }
                    } else {
                        log.lock().unwrap().push(line);
                    }
                }
            })
        };
        let addr = rx
            .recv_timeout(Duration::from_secs(60))
            .unwrap_or_else(|_| {
                panic!(
                    "no address reported; log:\n{}",
                    log.lock().unwrap().join("\n")
                )
            })
            .parse()
            .expect("a socket address");
        ServeProcess {
            child,
            addr,
            log,
            reader: Some(reader),
        }
    }

    pub fn pid(&self) -> u32 {
        self.child.id()
    }

    pub fn alive(&mut self) -> bool {
        matches!(self.child.try_wait(), Ok(None))
    }

    /// VmRSS in KiB, from /proc/<pid>/status (proc(5)).
    pub fn rss_kib(&self) -> u64 {
        let status = std::fs::read_to_string(format!("/proc/{}/status", self.child.id()))
            .expect("read /proc/<pid>/status");
        status
            .lines()
            .find_map(|l| l.strip_prefix("VmRSS:"))
            .and_then(|v| v.trim().trim_end_matches("kB").trim().parse().ok())
            .expect("a VmRSS line")
    }

    /// Sends SIGTERM (what Kubernetes and systemd send).
    pub fn signal_terminate(&self) {
        let st = Command::new("kill")
            .args(["-TERM", &self.child.id().to_string()])
            .status()
            .expect("run kill");
        assert!(st.success(), "kill -TERM {}", self.child.id());
    }

    /// Waits for the process to exit on its own; returns its status and every log line.
    pub fn wait(mut self) -> (ExitStatus, Vec<String>) {
        let status = self.child.wait().expect("wait for convoy serve");
        if let Some(r) = self.reader.take() {
            let _ = r.join();
        }
        let log = std::mem::take(&mut *self.log.lock().unwrap());
        (status, log)
    }

    /// SIGTERM, then [`wait`](Self::wait).
    pub fn terminate(self) -> (ExitStatus, Vec<String>) {
        self.signal_terminate();
        self.wait()
    }
}

impl Drop for ServeProcess {
    fn drop(&mut self) {
        if matches!(self.child.try_wait(), Ok(None)) {
            let _ = self.child.kill();
            let _ = self.child.wait();
        }
    }
}
