//! The servers under test, each a child process: started, asked for its address, waited on until
//! it serves, and killed when dropped.

use std::collections::VecDeque;
use std::io::{BufRead, BufReader, Read};
use std::net::SocketAddr;
use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::sync::mpsc;
use std::sync::{Arc, Mutex};
use std::thread;
use std::time::Duration;
use tonic_health::pb::health_check_response::ServingStatus;
use tonic_health::pb::health_client::HealthClient;
use tonic_health::pb::HealthCheckRequest;

use crate::Failure;

/// Which CPU the servers run on, when they are pinned.
pub type Pin = Option<usize>;

/// Pins this process (every thread: the load generator's) to `cpu` with `taskset`.
pub fn pin_self(cpu: usize) -> Result<(), Failure> {
    let status = Command::new("taskset")
        .args([
            "-a",
            "-p",
            "-c",
            &cpu.to_string(),
            &std::process::id().to_string(),
        ])
        .stdout(Stdio::null())
        .status()
        .map_err(|e| format!("cannot run taskset: {e}"))?;
    if !status.success() {
        return Err(format!("taskset could not pin the load generator to CPU {cpu}").into());
    }
    Ok(())
}

/// A command running `program`, on CPU `pin` when set (`taskset` sets the affinity and then
/// runs the program in its own process, so the pid is the server's).
fn command(pin: Pin, program: impl AsRef<std::ffi::OsStr>) -> Command {
    match pin {
        None => Command::new(program),
        Some(cpu) => {
            let mut c = Command::new("taskset");
            c.args(["-c", &cpu.to_string()]).arg(program);
            c
        }
    }
}

/// How long a server may take to announce its address.
const ANNOUNCE_TIMEOUT: Duration = Duration::from_secs(60);
/// Lines of a child's output kept for error messages.
const TAIL_LINES: usize = 40;

/// A running server process.
pub struct Server {
    pub name: &'static str,
    pub addr: SocketAddr,
    pub pid: u32,
    child: Child,
    tail: Arc<Mutex<VecDeque<String>>>,
    /// The first line logged at level ERROR (`candor serve --log-format json`), kept even after
    /// it leaves the tail.
    first_error: tokio::sync::watch::Receiver<Option<String>>,
}

impl Drop for Server {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

impl Server {
    /// The last lines the server wrote.
    pub fn tail(&self) -> String {
        let t = self.tail.lock().unwrap_or_else(|e| e.into_inner());
        t.iter().cloned().collect::<Vec<_>>().join("\n")
    }

    /// Resident memory of the server, bytes.
    pub fn resident_bytes(&self) -> Result<u64, Failure> {
        Ok(candor::loadgen::process::resident_bytes(self.pid)?)
    }
}

/// Starts `command`; `announce` picks the address out of one line of the stream named by
/// `on_stderr` (the other stream is discarded). The line reader keeps draining afterwards.
fn start(
    name: &'static str,
    command: &mut Command,
    on_stderr: bool,
    announce: fn(&str) -> Option<SocketAddr>,
) -> Result<Server, Failure> {
    command.stdin(Stdio::null());
    if on_stderr {
        command.stdout(Stdio::null()).stderr(Stdio::piped());
    } else {
        command.stdout(Stdio::piped()).stderr(Stdio::piped());
    }
    let mut child = command
        .spawn()
        .map_err(|e| format!("{name}: cannot start {command:?}: {e}"))?;
    let tail = Arc::new(Mutex::new(VecDeque::new()));
    let (first_error, first_error_rx) = tokio::sync::watch::channel(None);
    let (tx, rx) = mpsc::channel();
    let stderr: Box<dyn Read + Send> = Box::new(child.stderr.take().ok_or("no stderr pipe")?);
    let (watched, other): (Box<dyn Read + Send>, Option<Box<dyn Read + Send>>) = if on_stderr {
        (stderr, None)
    } else {
        let stdout = Box::new(child.stdout.take().ok_or("no stdout pipe")?);
        (stdout, Some(stderr))
    };
    for (reader, sender) in [(Some(watched), Some(tx)), (other, None)] {
        let Some(reader) = reader else { continue };
        let tail = tail.clone();
        let first_error = first_error.clone();
        thread::spawn(move || {
            for line in BufReader::new(reader).lines().map_while(Result::ok) {
                if let Some(addr) = announce(&line) {
                    if let Some(s) = &sender {
                        let _ = s.send(addr);
                    }
                }
                if line.contains(r#""level":"ERROR""#) {
                    first_error.send_if_modified(|e| {
                        let first = e.is_none();
                        e.get_or_insert_with(|| line.clone());
                        first
                    });
                }
                let mut t = tail.lock().unwrap_or_else(|e| e.into_inner());
                if t.len() == TAIL_LINES {
                    t.pop_front();
                }
                t.push_back(line);
            }
        });
    }
    let pid = child.id();
    let mut server = Server {
        name,
        addr: SocketAddr::from(([127, 0, 0, 1], 0)),
        pid,
        child,
        tail,
        first_error: first_error_rx,
    };
    match rx.recv_timeout(ANNOUNCE_TIMEOUT) {
        Ok(addr) => {
            server.addr = addr;
            Ok(server)
        }
        Err(_) => Err(format!(
            "{name} did not announce its address within {ANNOUNCE_TIMEOUT:?}; its output:\n{}",
            server.tail()
        )
        .into()),
    }
}

/// `listening ADDR` on a line of its own (the floor and the Python server).
fn listening_line(line: &str) -> Option<SocketAddr> {
    line.strip_prefix("listening ")?.trim().parse().ok()
}

/// The JSON log line `candor serve --log-format json` writes once bound.
fn candor_listening(line: &str) -> Option<SocketAddr> {
    let v: serde_json::Value = serde_json::from_str(line).ok()?;
    if v["fields"]["message"] != "listening" {
        return None;
    }
    v["fields"]["addr"].as_str()?.parse().ok()
}

/// A transport floor: this benchmark binary re-invoked with `--floor` (prost's generated
/// messages) or `--floor --bulk` (candor's messages).
pub fn floor(pin: Pin, bulk: bool) -> Result<Server, Failure> {
    let mut cmd = command(pin, std::env::current_exe()?);
    cmd.arg("--floor");
    if bulk {
        cmd.arg("--bulk");
    }
    start(
        if bulk { "bulk floor" } else { "floor" },
        &mut cmd,
        false,
        listening_line,
    )
}

/// `candor serve` on a free loopback port with the maps in `dir` and `extra` flags, waited on
/// until its health check says SERVING (every map loaded).
pub fn candor(
    runtime: &tokio::runtime::Runtime,
    dir: &Path,
    extra: &[String],
    ready_timeout: Duration,
    pin: Pin,
) -> Result<Server, Failure> {
    let server = start(
        "candor",
        command(pin, env!("CARGO_BIN_EXE_candor"))
            .args([
                "serve",
                "--listen",
                "127.0.0.1:0",
                "--admin-listen",
                "off",
                "--log-format",
                "json",
                "--maps",
            ])
            .arg(dir)
            .args(extra),
        true,
        candor_listening,
    )?;
    // A refused map keeps the sidecar from ever becoming ready: stop waiting at once.
    let first_error = server.first_error.clone();
    let ready = runtime.block_on(async {
        tokio::select! {
            r = tokio::time::timeout(ready_timeout, serving(server.addr)) => r,
            line = first_logged(first_error) => Ok(Err(format!(
                "candor logged an error while loading, so it will not become ready: {line}"
            ).into())),
        }
    });
    match ready {
        Ok(Ok(())) => Ok(server),
        Ok(Err(e)) => Err(format!("candor did not become ready: {e}\n{}", server.tail()).into()),
        Err(_) => Err(format!(
            "candor not SERVING within {ready_timeout:?}; its output:\n{}",
            server.tail()
        )
        .into()),
    }
}

/// Resolves with the first ERROR line once one has been logged; never, if the server's output
/// ends without one.
async fn first_logged(mut first_error: tokio::sync::watch::Receiver<Option<String>>) -> String {
    match first_error.wait_for(Option::is_some).await {
        Ok(line) => line.clone().unwrap_or_default(),
        Err(_) => std::future::pending().await,
    }
}

/// Completes when the server's overall health becomes SERVING.
async fn serving(addr: SocketAddr) -> Result<(), Failure> {
    let channel = tonic::transport::Endpoint::from_shared(format!("http://{addr}"))?
        .connect()
        .await?;
    let mut health = HealthClient::new(channel);
    let mut watch = health
        .watch(HealthCheckRequest {
            service: String::new(),
        })
        .await?
        .into_inner();
    while let Some(status) = watch.message().await? {
        if status.status == ServingStatus::Serving as i32 {
            return Ok(());
        }
    }
    Err("the health watch ended before SERVING".into())
}

/// The hand-written Python server (bench/python_server.py) serving the temperature `maps`.
pub fn python(maps: &[std::path::PathBuf], pin: Pin) -> Result<Server, Failure> {
    let script = concat!(env!("CARGO_MANIFEST_DIR"), "/bench/python_server.py");
    start(
        "python",
        command(pin, "python3")
            .arg(script)
            .args(["--listen", "127.0.0.1:0"])
            .args(maps),
        false,
        listening_line,
    )
}
