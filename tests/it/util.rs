//! Shared helpers: temporary workspaces in the recycling-plant scenario, running the daemon binary,
//! dropping files the way vendors do, waiting for verdicts, tiny HTTP GETs.
#![allow(dead_code)]

use std::io::{Read, Write};
use std::net::{SocketAddr, TcpListener, TcpStream};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus, Stdio};
use std::time::{Duration, Instant};

use labelweir::scenario::{self, Plant};
use ndarray::{Array2, Axis};
use tempfile::TempDir;

/// The binary under test.
pub fn bin() -> &'static str {
    env!("CARGO_BIN_EXE_labelweir")
}

/// An outside program found by the build script (`build.rs`), given as `env!("LABELWEIR_TOOL_<VAR>")`.
///
/// A test that calls this carries `#[cfg_attr(all(not(has_<tool>), not(labelweir_ci)), ignore = "...")]`, so
/// it runs only where the program was found, or under CI, where a missing program fails it here.
pub fn tool(found: &str, name: &str) -> PathBuf {
    assert!(
        !found.is_empty(),
        "{name} not found at build time; under CI it is required (`bash .ci/run` installs it; see build.rs)"
    );
    let p = PathBuf::from(found);
    assert!(
        p.is_file(),
        "{name} was found at build time as {} but is gone; `touch build.rs` and rebuild",
        p.display()
    );
    p
}

/// Run the binary to completion.
pub fn run_bin(args: &[&str]) -> std::process::Output {
    Command::new(bin())
        .args(args)
        .output()
        .expect("run labelweir")
}

/// A batch of plant items with names and (possibly flipped) labels.
pub struct Batch {
    /// Item ids.
    pub ids: Vec<String>,
    /// Labels as delivered.
    pub labels: Vec<usize>,
    /// Features.
    pub x: Array2<f64>,
    /// Which items were flipped.
    pub flipped: Vec<bool>,
}

impl Batch {
    /// CSV bytes.
    pub fn csv(&self) -> Vec<u8> {
        let mut out = Vec::new();
        labelweir::data::write_csv(
            &mut out,
            ("id", "label"),
            &self.ids,
            &scenario::label_names(&self.labels),
            &scenario::feature_names(),
            self.x.view(),
        )
        .unwrap();
        out
    }

    /// JSON Lines bytes.
    pub fn jsonl(&self) -> Vec<u8> {
        let mut out = Vec::new();
        labelweir::data::write_jsonl(
            &mut out,
            ("id", "label"),
            &self.ids,
            &scenario::label_names(&self.labels),
            &scenario::feature_names(),
            self.x.view(),
        )
        .unwrap();
        out
    }
}

/// The plant used by every test (seeded).
pub fn plant() -> Plant {
    Plant::new(11)
}

/// A clean batch of `n` items.
pub fn clean_batch(prefix: &str, n: usize, seed: u64) -> Batch {
    let (x, y) = plant().sample(n, seed);
    Batch {
        ids: scenario::item_ids(prefix, n),
        flipped: vec![false; n],
        labels: y,
        x,
    }
}

/// A batch whose items in one region of feature space are flipped to one class (systematic-bias
/// setting of Zhang, Zhu & Wright 2018; recipe in tests/reference/check-values.md §3).
pub fn region_flipped_batch(prefix: &str, n: usize, seed: u64, rate: f64) -> Batch {
    let (x, y) = plant().sample(n, seed);
    let (labels, flipped) = scenario::region_flips(x.view(), &y, 0, rate, seed + 1);
    Batch {
        ids: scenario::item_ids(prefix, n),
        labels,
        x,
        flipped,
    }
}

/// A batch with uniform random flips (Xiao, Xiao & Eckert, ECAI 2012, random baseline).
pub fn uniform_flipped_batch(prefix: &str, n: usize, seed: u64, rate: f64) -> Batch {
    let (x, y) = plant().sample(n, seed);
    let (labels, flipped) = scenario::uniform_flips(&y, Plant::N_CLASSES, rate, seed + 1);
    Batch {
        ids: scenario::item_ids(prefix, n),
        labels,
        x,
        flipped,
    }
}

/// A trusted set: `per_class` items of every class.
pub fn trusted_csv(per_class: usize) -> Vec<u8> {
    let (x, y) = plant().sample_per_class(per_class, 999);
    let b = Batch {
        ids: scenario::item_ids("trusted", y.len()),
        flipped: vec![false; y.len()],
        labels: y,
        x,
    };
    b.csv()
}

/// A pool-seeding batch: `n` clean items.
pub fn concat(batches: &[&Batch]) -> Batch {
    let views: Vec<_> = batches.iter().map(|b| b.x.view()).collect();
    Batch {
        ids: batches.iter().flat_map(|b| b.ids.clone()).collect(),
        labels: batches.iter().flat_map(|b| b.labels.clone()).collect(),
        flipped: batches.iter().flat_map(|b| b.flipped.clone()).collect(),
        x: ndarray::concatenate(Axis(0), &views).unwrap(),
    }
}

/// A temporary workspace created with `labelweir init`.
pub struct Ws {
    /// Keeps the folder alive.
    pub tmp: TempDir,
    /// The workspace root.
    pub dir: PathBuf,
}

impl Ws {
    /// `labelweir init` with these vendors and a 10-per-class trusted set; the config is then tuned for
    /// tests (short quiet period and rescan interval). Extra `key = value` replacements may follow.
    pub fn new(vendors: &[&str]) -> Self {
        Self::with(vendors, &[])
    }

    /// Like [`Ws::new`], with `(old line, new line)` replacements in labelweir.toml.
    pub fn with(vendors: &[&str], edits: &[(&str, &str)]) -> Self {
        let tmp = tempfile::tempdir().unwrap();
        let dir = tmp.path().join("ws");
        let trusted = tmp.path().join("trusted.csv");
        std::fs::write(&trusted, trusted_csv(10)).unwrap();
        let mut args = vec![
            "init".to_string(),
            dir.display().to_string(),
            "--trusted".into(),
            trusted.display().to_string(),
            "--by".into(),
            "expert-a".into(),
        ];
        for v in vendors {
            args.push("--vendor".into());
            args.push(v.to_string());
        }
        let out = Command::new(bin()).args(&args).output().unwrap();
        assert!(
            out.status.success(),
            "init failed: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        let ws = Self { tmp, dir };
        let mut all = vec![
            ("quiet_period_ms = 2000", "quiet_period_ms = 150"),
            ("rescan_interval_secs = 60", "rescan_interval_secs = 1"),
            ("min_free_bytes = 67108864", "min_free_bytes = 1"),
        ];
        all.extend_from_slice(edits);
        ws.edit_config(&all);
        ws
    }

    /// A workspace whose accepted batches enter the pool whole (`[admission] flagged = "enter"`), for
    /// tests about other things that count pool items batch by batch.
    pub fn whole_batches(vendors: &[&str]) -> Self {
        Self::with(vendors, &[("flagged = \"hold\"", "flagged = \"enter\"")])
    }

    /// Replace lines in labelweir.toml.
    pub fn edit_config(&self, edits: &[(&str, &str)]) {
        let p = self.dir.join("labelweir.toml");
        let mut text = std::fs::read_to_string(&p).unwrap();
        for (a, b) in edits {
            assert!(text.contains(a), "config has no line {a:?}");
            text = text.replace(a, b);
        }
        std::fs::write(&p, text).unwrap();
    }

    /// A folder of the workspace.
    pub fn path(&self, rel: &str) -> PathBuf {
        self.dir.join(rel)
    }

    /// Deliver a file the way the contract says: write under a temporary name, then rename.
    pub fn deliver(&self, vendor: &str, name: &str, bytes: &[u8]) {
        let d = self.dir.join("inbox").join(vendor);
        let tmp = d.join(format!(".{name}.part"));
        std::fs::write(&tmp, bytes).unwrap();
        std::fs::rename(&tmp, d.join(name)).unwrap();
    }

    /// Batch files (not reports, not hidden) in a folder.
    pub fn files_in(&self, folder: &str) -> Vec<String> {
        let mut v: Vec<String> = std::fs::read_dir(self.dir.join(folder))
            .map(|rd| {
                rd.flatten()
                    .map(|e| e.file_name().to_string_lossy().into_owned())
                    .filter(|n| !n.starts_with('.') && !n.ends_with(".report.json"))
                    .collect()
            })
            .unwrap_or_default();
        v.sort();
        v
    }

    /// Number of settled batches in accepted/, quarantine/ and rejected/: distinct batch ids among the
    /// files and reports there (a rejected symbolic link leaves only its report).
    pub fn settled(&self) -> usize {
        let mut ids = std::collections::HashSet::new();
        for f in ["accepted", "quarantine", "rejected"] {
            if let Ok(rd) = std::fs::read_dir(self.dir.join(f)) {
                for e in rd.flatten() {
                    let n = e.file_name().to_string_lossy().into_owned();
                    if !n.starts_with('.') {
                        ids.insert(n.split('.').next().unwrap_or_default().to_string());
                    }
                }
            }
        }
        ids.len()
    }

    /// Wait until `n` batch files are settled (panics after `timeout`).
    pub fn wait_settled(&self, n: usize, timeout: Duration) {
        let t = Instant::now();
        while self.settled() < n {
            assert!(
                t.elapsed() < timeout,
                "only {} of {n} batches settled after {timeout:?}",
                self.settled()
            );
            std::thread::sleep(Duration::from_millis(50));
        }
    }

    /// Wait until `n` batches are settled in the store, not only in the folders: the audit trail holds
    /// `n` `filed` records (the last step of filing, after the file move, the notices and any recall).
    /// A test that reads the store through the command line right after [`Ws::wait_settled`] can see a
    /// held batch whose file is in `quarantine/` while its record is still between the two steps (found
    /// when the recall test picked the next held batch instead, about 1 run in 5). Panics after `timeout`.
    pub fn wait_filed(&self, n: usize, timeout: Duration) {
        let t = Instant::now();
        self.wait_settled(n, timeout);
        let dir = self.dir.display().to_string();
        loop {
            let out = run_bin(&["audit", &dir, "--json"]);
            let filed = String::from_utf8_lossy(&out.stdout)
                .lines()
                .filter_map(|l| serde_json::from_str::<serde_json::Value>(l).ok())
                .filter(|v| v["action"] == "filed")
                .count();
            if filed >= n {
                return;
            }
            assert!(
                t.elapsed() < timeout,
                "only {filed} of {n} batches filed in the store after {timeout:?}"
            );
            std::thread::sleep(Duration::from_millis(50));
        }
    }

    /// The report beside a quarantined or rejected batch file.
    pub fn report(&self, folder: &str, file: &str) -> serde_json::Value {
        let stem = file.split('.').next().unwrap();
        let p = self.dir.join(folder).join(format!("{stem}.report.json"));
        serde_json::from_slice(
            &std::fs::read(&p).unwrap_or_else(|e| panic!("{}: {e}", p.display())),
        )
        .unwrap()
    }

    /// The JSON notice for a batch id. Filing writes the notice after it moves the batch file, so a test that
    /// saw the file settle may be a moment early: wait (up to 30 s) for the notice to appear. It is written
    /// atomically, so once there it is whole.
    pub fn notice(&self, vendor: &str, batch_id: &str) -> serde_json::Value {
        let dir = self.dir.join("notices").join(vendor);
        let t = Instant::now();
        let mut p = notice_file(&dir, batch_id, "json");
        while !p.exists() && t.elapsed() < Duration::from_secs(30) {
            std::thread::sleep(Duration::from_millis(50));
            p = notice_file(&dir, batch_id, "json");
        }
        serde_json::from_slice(
            &std::fs::read(&p).unwrap_or_else(|e| panic!("{}: {e}", p.display())),
        )
        .unwrap()
    }

    /// Open the store (the daemon must be stopped).
    pub fn store(&self) -> labelweir::store::Store {
        labelweir::store::Store::open_workspace(&self.dir, &Default::default()).expect("open store")
    }
}

/// The notice file of a batch's first verdict in a vendor's notice folder, `<file>.<batch id>.<ext>`
/// (`ext` is `json`, `md` or `items.csv`; for a review decision pass `rejected.json` and so on). When none
/// is there yet: the path it will have, named after the first-verdict notice's delivered file.
pub fn notice_file(dir: &Path, batch_id: &str, ext: &str) -> PathBuf {
    let suffix = format!(".{batch_id}.{ext}");
    let bare = format!("{batch_id}.{ext}");
    std::fs::read_dir(dir)
        .ok()
        .and_then(|rd| {
            rd.flatten()
                .map(|e| e.file_name().to_string_lossy().into_owned())
                .find(|n| !n.starts_with('.') && (n.ends_with(&suffix) || *n == bare))
        })
        .map_or_else(
            || dir.join(first_verdict_prefix(dir, batch_id) + &bare),
            |n| dir.join(n),
        )
}

/// `<file>.` from the batch's first-verdict notice (`<file>.<batch id>.json`), or empty.
fn first_verdict_prefix(dir: &Path, batch_id: &str) -> String {
    let suffix = format!(".{batch_id}.json");
    std::fs::read_dir(dir)
        .ok()
        .and_then(|rd| {
            rd.flatten()
                .map(|e| e.file_name().to_string_lossy().into_owned())
                .find(|n| !n.starts_with('.') && n.ends_with(&suffix))
        })
        .map(|n| n[..n.len() - suffix.len() + 1].to_string())
        .unwrap_or_default()
}

/// A free TCP port on 127.0.0.1 (bound and released; good enough for tests).
pub fn free_addr() -> SocketAddr {
    let l = TcpListener::bind("127.0.0.1:0").unwrap();
    l.local_addr().unwrap()
}

/// GET a path; returns (status, body).
pub fn http_get(addr: SocketAddr, path: &str) -> std::io::Result<(u16, String)> {
    let mut s = TcpStream::connect_timeout(&addr, Duration::from_secs(2))?;
    s.set_read_timeout(Some(Duration::from_secs(5)))?;
    write!(
        s,
        "GET {path} HTTP/1.1\r\nHost: {addr}\r\nConnection: close\r\n\r\n"
    )?;
    let mut buf = Vec::new();
    s.read_to_end(&mut buf)?;
    let text = String::from_utf8_lossy(&buf).into_owned();
    let status = text
        .split_whitespace()
        .nth(1)
        .and_then(|c| c.parse().ok())
        .unwrap_or(0);
    let body = text
        .split_once("\r\n\r\n")
        .map(|(_, b)| b.to_string())
        .unwrap_or_default();
    Ok((status, dechunk(&body)))
}

/// Undo HTTP/1.1 chunked transfer encoding if the body looks chunked.
fn dechunk(body: &str) -> String {
    let mut out = String::new();
    let mut rest = body;
    loop {
        let Some((len, after)) = rest.split_once("\r\n") else {
            return body.to_string();
        };
        let Ok(n) = usize::from_str_radix(len.trim(), 16) else {
            return body.to_string();
        };
        if n == 0 {
            return out;
        }
        if after.len() < n {
            return body.to_string();
        }
        out.push_str(&after[..n]);
        rest = after[n..].trim_start_matches("\r\n");
    }
}

/// A running `labelweir run` process.
pub struct Daemon {
    /// The child.
    pub child: Option<Child>,
    /// Its metrics address.
    pub addr: SocketAddr,
    /// Its log file.
    pub log: PathBuf,
}

impl Daemon {
    /// Start `labelweir run` on the workspace and wait until /readyz answers 200.
    pub fn start(ws: &Ws) -> Self {
        let d = Self::spawn(
            &ws.dir,
            &ws.tmp.path().join(format!("daemon-{}.log", unique())),
        );
        d.wait_ready(Duration::from_secs(60));
        d
    }

    /// Start without waiting.
    pub fn spawn(dir: &Path, log: &Path) -> Self {
        let addr = free_addr();
        let logf = std::fs::File::create(log).unwrap();
        let child = Command::new(bin())
            .args([
                "run",
                &dir.display().to_string(),
                "--listen",
                &addr.to_string(),
            ])
            .stdout(Stdio::from(logf.try_clone().unwrap()))
            .stderr(Stdio::from(logf))
            .spawn()
            .unwrap();
        Self {
            child: Some(child),
            addr,
            log: log.to_path_buf(),
        }
    }

    /// Wait for /readyz 200.
    pub fn wait_ready(&self, timeout: Duration) {
        let t = Instant::now();
        loop {
            if let Ok((200, _)) = http_get(self.addr, "/readyz") {
                return;
            }
            assert!(
                t.elapsed() < timeout,
                "daemon not ready; log:\n{}",
                self.log_text()
            );
            std::thread::sleep(Duration::from_millis(50));
        }
    }

    /// The daemon's process id.
    pub fn pid(&self) -> u32 {
        self.child.as_ref().map_or(0, std::process::Child::id)
    }

    /// Wait until the daemon's log contains `needle`.
    pub fn wait_log(&self, needle: &str, timeout: Duration) {
        let t = Instant::now();
        while !self.log_text().contains(needle) {
            assert!(
                t.elapsed() < timeout,
                "no {needle:?} in the log:\n{}",
                self.log_text()
            );
            std::thread::sleep(Duration::from_millis(50));
        }
    }

    /// The daemon's log so far.
    pub fn log_text(&self) -> String {
        std::fs::read_to_string(&self.log).unwrap_or_default()
    }

    /// Send SIGTERM and wait for the exit status.
    pub fn stop(mut self) -> ExitStatus {
        let mut child = self.child.take().unwrap();
        signal(child.id(), "TERM");
        wait_with_timeout(&mut child, Duration::from_secs(60))
    }

    /// SIGKILL it.
    pub fn kill(mut self) {
        if let Some(mut c) = self.child.take() {
            let _ = c.kill();
            let _ = c.wait();
        }
    }
}

impl Drop for Daemon {
    fn drop(&mut self) {
        if let Some(mut c) = self.child.take() {
            let _ = c.kill();
            let _ = c.wait();
        }
    }
}

/// Send a signal (`TERM`, `INT`, `KILL`) to a process we started, by its id.
pub fn signal(pid: u32, sig: &str) {
    let _ = Command::new("kill")
        .args([format!("-{sig}"), pid.to_string()])
        .status();
}

/// Wait for a child, killing it after `timeout`.
pub fn wait_with_timeout(child: &mut Child, timeout: Duration) -> ExitStatus {
    let t = Instant::now();
    loop {
        if let Some(s) = child.try_wait().unwrap() {
            return s;
        }
        if t.elapsed() > timeout {
            let _ = child.kill();
            panic!("process did not exit within {timeout:?}");
        }
        std::thread::sleep(Duration::from_millis(20));
    }
}

fn unique() -> u64 {
    use std::sync::atomic::{AtomicU64, Ordering};
    static N: AtomicU64 = AtomicU64::new(0);
    N.fetch_add(1, Ordering::SeqCst)
}

/// Run the shell command line `cmd` on a pseudo-terminal (`script` from util-linux gives it one and copies
/// what it shows to its own stdout); returns the exit code and what the terminal showed.
pub fn on_a_terminal(cmd: &str) -> (Option<i32>, String) {
    let tty = Command::new("script")
        .args(["-qefc", cmd, "/dev/null"])
        .stdin(Stdio::null())
        .output()
        .expect("script (util-linux) runs");
    (
        tty.status.code(),
        String::from_utf8_lossy(&tty.stdout).into_owned(),
    )
}
