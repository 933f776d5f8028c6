//! Recording of accepted batches (`[server.recording]`) and the one reader of recordings that
//! `batch` and `replay` share.
//!
//! **Writer.** [`Recorder`] owns a dedicated OS thread that appends one JSON line per accepted
//! batch (the contract's detection batch, plus `"recv"`: arrival time, UNIX seconds) to the
//! current file of the recording directory. Lines are queued in the order in which batches are
//! admitted (the same order the engine sees), so a file replays into the same frames. Each
//! batch's acknowledgement waits for its line per the [`SyncPolicy`]; the thread writes
//! whatever has queued up since its last pass in one go and syncs once for all of it (group
//! commit), so sensors do not wait behind each other's fsync. The thread counts what it does
//! in [`RecordingMetrics`] (`plotweave_recording_*`: lines, bytes, fsyncs, errors, the time of
//! each pass, and the lines waiting for it).
//!
//! Files are named `rec-YYYYMMDDTHHMMSS.mmmZ-NNNN.jsonl` (UTC time of opening, then a counter),
//! so `ls` order is time order; a new file starts when the current one would exceed
//! `rotate_bytes` or is older than `rotate_seconds`. Sensors interleave in arrival order.
//!
//! **Reader.** [`RecordingReader`] yields each line with its number, or a report for a line
//! that cannot be used: not UTF-8, empty, or a **torn last line**, a final line without its
//! newline that is not valid JSON, which is what a crash in the middle of a write leaves behind.
//! Everything before a torn line is intact: lines are written whole, each ending in `\n`.

use std::fs::{File, OpenOptions};
use std::io::{BufRead, BufWriter, Write};
use std::path::{Path, PathBuf};
use std::sync::Mutex;
use std::sync::mpsc as std_mpsc;
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use tokio::sync::oneshot;

use crate::error::Error;
use crate::metrics::RecordingMetrics;

/// When a recorded line counts as written, i.e. when the batch may be acknowledged.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SyncPolicy {
    /// Acknowledge once the line is in the process's write buffer (lost if the process dies).
    None,
    /// Acknowledge after `write(2)` of the line: survives a crash of the process, not of the
    /// machine.
    Flush,
    /// Acknowledge after `fsync(2)` of the file: survives a power cut.
    Fsync,
    /// Acknowledge after `write(2)`; the file is fsynced at most this often (bounded loss on a
    /// power cut).
    Interval(Duration),
}

/// The `[server.recording]` section (see `docs/configuration.md`).
#[derive(Debug, Clone, PartialEq)]
pub struct RecordingConfig {
    /// Directory of the recording files (created if missing).
    pub directory: PathBuf,
    /// Start a new file before one would exceed this many bytes; `None` = no size limit.
    pub rotate_bytes: Option<u64>,
    /// Start a new file once the current one is this old; `None` = no age limit.
    pub rotate_seconds: Option<f64>,
    /// When a line counts as written.
    pub sync: SyncPolicy,
}

/// Lines waiting for the writer thread, most of them queued while it synced the previous ones.
/// The bound is generous because each entry is a batch the engine has already queued; when it
/// is full, [`Recorder::append`] waits (the ingest connection then reads no further).
pub const RECORDER_QUEUE: usize = 1024;

enum Job {
    Line {
        text: String,
        done: oneshot::Sender<Result<(), String>>,
    },
    Stop,
}

/// Handle of the recording thread. Dropping it does not flush; call [`Recorder::shutdown`].
pub struct Recorder {
    tx: std_mpsc::SyncSender<Job>,
    thread: Mutex<Option<std::thread::JoinHandle<()>>>,
    metrics: RecordingMetrics,
    current: std::sync::Arc<Mutex<PathBuf>>,
}

impl std::fmt::Debug for Recorder {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("Recorder")
    }
}

/// Reads the recording's current file from any thread (see [`Recorder::current_file`]).
#[derive(Debug, Clone)]
pub struct CurrentFile(std::sync::Arc<Mutex<PathBuf>>);

impl CurrentFile {
    /// The file being written now.
    pub fn get(&self) -> PathBuf {
        self.0
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
            .clone()
    }
}

/// A pending acknowledgement: resolves when the line is written per the policy.
pub type Written = oneshot::Receiver<Result<(), String>>;

impl Recorder {
    /// Create the directory if needed, open the first file and start the thread.
    ///
    /// # Errors
    /// [`Error::Io`] naming the directory or file if it cannot be created.
    pub fn start(config: RecordingConfig) -> Result<Recorder, Error> {
        Self::start_metered(config, RecordingMetrics::new())
    }

    /// [`Recorder::start`], counting into `metrics` (the service's registered
    /// `plotweave_recording_*`).
    ///
    /// # Errors
    /// As [`Recorder::start`].
    pub fn start_metered(
        config: RecordingConfig,
        metrics: RecordingMetrics,
    ) -> Result<Recorder, Error> {
        std::fs::create_dir_all(&config.directory).map_err(|e| {
            Error::io(
                format!(
                    "cannot create the recording directory {}",
                    config.directory.display()
                ),
                e,
            )
        })?;
        let mut files = Files::open(config, metrics.clone())?;
        let current = files.current.clone();
        let (tx, rx) = std_mpsc::sync_channel(RECORDER_QUEUE);
        let thread = std::thread::Builder::new()
            .name("plotweave-recorder".into())
            .spawn(move || files.run(rx))
            .map_err(|e| Error::io("cannot start the recording thread", e))?;
        Ok(Recorder {
            tx,
            thread: Mutex::new(Some(thread)),
            metrics,
            current,
        })
    }

    /// The file being written now (it changes when the recording rotates). Every line queued
    /// from now on goes to this file or a later one (in name order).
    pub fn current_file(&self) -> PathBuf {
        self.current
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
            .clone()
    }

    /// A handle that reads [`Recorder::current_file`] from another thread.
    pub fn current_file_handle(&self) -> CurrentFile {
        CurrentFile(self.current.clone())
    }

    /// Queue `batch_text` (one batch as received; re-serialised on one line with `"recv"`).
    /// Never blocks the runtime for long: the queue holds [`RECORDER_QUEUE`] lines.
    pub fn append(&self, batch_text: &str, recv: f64) -> Written {
        let (done, rx) = oneshot::channel();
        let text = record_line(batch_text, recv);
        // Counted before the send: the writer decrements once it has taken the line.
        self.metrics.queue_depth.inc();
        match self.tx.try_send(Job::Line { text, done }) {
            Ok(()) => {}
            Err(std_mpsc::TrySendError::Full(job)) => {
                // Rare: the disk is slower than the sensors. Wait on this thread (a short,
                // bounded wait; the writer drains the queue in one pass).
                if let Err(std_mpsc::SendError(Job::Line { done, .. })) = self.tx.send(job) {
                    self.metrics.queue_depth.dec();
                    let _ = done.send(Err("the recorder has stopped".into()));
                }
            }
            Err(std_mpsc::TrySendError::Disconnected(Job::Line { done, .. })) => {
                self.metrics.queue_depth.dec();
                let _ = done.send(Err("the recorder has stopped".into()));
            }
            Err(_) => {}
        }
        rx
    }

    /// Write and sync everything queued, close the file and stop the thread.
    pub fn shutdown(&self) {
        let _ = self.tx.send(Job::Stop);
        let t = self
            .thread
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
            .take();
        if let Some(t) = t
            && t.join().is_err()
        {
            tracing::error!("the recording thread panicked");
        }
    }
}

/// One batch as a recording line: the JSON object on one line with `"recv"` set.
pub fn record_line(batch_text: &str, recv: f64) -> String {
    match serde_json::from_str::<serde_json::Value>(batch_text) {
        Ok(serde_json::Value::Object(mut m)) => {
            if let Some(n) = serde_json::Number::from_f64(recv) {
                m.insert("recv".into(), serde_json::Value::Number(n));
            }
            serde_json::Value::Object(m).to_string()
        }
        // Decoded batches are objects; anything else is kept as it came, on one line.
        _ => batch_text.replace(['\n', '\r'], " "),
    }
}

/// Seconds since the UNIX epoch now.
pub fn unix_now() -> f64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0.0, |d| d.as_secs_f64())
}

/// `YYYYMMDDTHHMMSS.mmmZ` of UNIX time `t` (UTC), via the civil-from-days algorithm of
/// H. Hinnant, "chrono-Compatible Low-Level Date Algorithms" (2013, cited from memory).
pub fn utc_stamp(t: f64) -> String {
    let ms_total = (t.max(0.0) * 1000.0).floor() as i64;
    let (secs, ms) = (ms_total.div_euclid(1000), ms_total.rem_euclid(1000));
    let (days, sod) = (secs.div_euclid(86_400), secs.rem_euclid(86_400));
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    let y = yoe + era * 400 + i64::from(m <= 2);
    format!(
        "{y:04}{m:02}{d:02}T{:02}{:02}{:02}.{ms:03}Z",
        sod / 3600,
        (sod / 60) % 60,
        sod % 60
    )
}

/// The writer thread's state: the current file and the rotation rules.
struct Files {
    config: RecordingConfig,
    out: BufWriter<File>,
    path: PathBuf,
    bytes: u64,
    opened: Instant,
    last_sync: Instant,
    dirty: bool,
    counter: u32,
    metrics: RecordingMetrics,
    /// `path`, shared with [`Recorder::current_file`].
    current: std::sync::Arc<Mutex<PathBuf>>,
}

impl Files {
    fn open(config: RecordingConfig, metrics: RecordingMetrics) -> Result<Files, Error> {
        let (out, path, counter) = new_file(&config.directory, 0, config.sync)?;
        Ok(Files {
            config,
            out,
            current: std::sync::Arc::new(Mutex::new(path.clone())),
            path,
            bytes: 0,
            opened: Instant::now(),
            last_sync: Instant::now(),
            dirty: false,
            counter,
            metrics,
        })
    }

    fn run(&mut self, rx: std_mpsc::Receiver<Job>) {
        tracing::info!(file = %self.path.display(), "recording");
        let mut pending = Vec::new();
        loop {
            let first = match self.config.sync {
                SyncPolicy::Interval(every) if self.dirty => {
                    let left = every.saturating_sub(self.last_sync.elapsed());
                    match rx.recv_timeout(left) {
                        Ok(j) => Some(j),
                        Err(std_mpsc::RecvTimeoutError::Timeout) => {
                            self.sync_now();
                            continue;
                        }
                        Err(std_mpsc::RecvTimeoutError::Disconnected) => None,
                    }
                }
                _ => rx.recv().ok(),
            };
            let mut stop = first.is_none();
            if let Some(j) = first {
                pending.push(j);
            }
            while let Ok(j) = rx.try_recv() {
                pending.push(j);
            }
            let mut waiting = Vec::with_capacity(pending.len());
            let mut result = Ok(());
            let pass = Instant::now();
            for job in pending.drain(..) {
                match job {
                    Job::Stop => stop = true,
                    Job::Line { text, done } => {
                        if result.is_ok() {
                            result = self.write_line(&text);
                        }
                        waiting.push(done);
                    }
                }
            }
            if result.is_ok() && !waiting.is_empty() {
                result = self.commit();
            }
            if !waiting.is_empty() {
                let m = &self.metrics;
                m.queue_depth.dec_by(waiting.len() as i64);
                m.commit_seconds.observe(pass.elapsed().as_secs_f64());
                if result.is_err() {
                    m.write_errors.inc();
                }
            }
            let reply = result.map_err(|e| {
                tracing::error!(file = %self.path.display(), error = %e, "recording failed");
                format!("cannot write the recording {}: {e}", self.path.display())
            });
            for done in waiting {
                let _ = done.send(reply.clone());
            }
            if stop {
                break;
            }
        }
        let _ = self.out.flush();
        if self.out.get_ref().sync_all().is_ok() {
            self.metrics.fsyncs.inc();
        }
        tracing::info!(file = %self.path.display(), "recording closed");
    }

    fn write_line(&mut self, text: &str) -> std::io::Result<()> {
        let len = text.len() as u64 + 1;
        let too_big = self
            .config
            .rotate_bytes
            .is_some_and(|max| self.bytes > 0 && self.bytes + len > max);
        let too_old = self
            .config
            .rotate_seconds
            .is_some_and(|max| self.bytes > 0 && self.opened.elapsed().as_secs_f64() >= max);
        if too_big || too_old {
            self.rotate()?;
        }
        self.out.write_all(text.as_bytes())?;
        self.out.write_all(b"\n")?;
        self.bytes += len;
        self.dirty = true;
        self.metrics.batches.inc();
        self.metrics.bytes.inc_by(len);
        Ok(())
    }

    /// Make the lines written so far count, per the policy.
    fn commit(&mut self) -> std::io::Result<()> {
        match self.config.sync {
            SyncPolicy::None => Ok(()),
            SyncPolicy::Flush => self.out.flush(),
            SyncPolicy::Interval(every) => {
                self.out.flush()?;
                // A steady stream never lets the idle timeout in `run` fire; sync here too.
                if self.last_sync.elapsed() >= every {
                    self.sync_now();
                }
                Ok(())
            }
            SyncPolicy::Fsync => {
                self.out.flush()?;
                self.out.get_ref().sync_data()?;
                self.metrics.fsyncs.inc();
                self.dirty = false;
                Ok(())
            }
        }
    }

    fn sync_now(&mut self) {
        let r = self
            .out
            .flush()
            .and_then(|()| self.out.get_ref().sync_data());
        match r {
            Ok(()) => {
                self.metrics.fsyncs.inc();
            }
            Err(e) => {
                self.metrics.write_errors.inc();
                tracing::error!(file = %self.path.display(), error = %e, "recording fsync failed");
            }
        }
        self.dirty = false;
        self.last_sync = Instant::now();
    }

    fn rotate(&mut self) -> std::io::Result<()> {
        self.out.flush()?;
        if self.config.sync != SyncPolicy::None {
            self.out.get_ref().sync_all()?;
            self.metrics.fsyncs.inc();
        }
        let (out, path, counter) =
            new_file(&self.config.directory, self.counter + 1, self.config.sync).map_err(|e| {
                match e {
                    Error::Io { source, .. } => source,
                    other => std::io::Error::other(other.to_string()),
                }
            })?;
        tracing::info!(from = %self.path.display(), to = %path.display(), "recording rotated");
        self.out = out;
        *self
            .current
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner) = path.clone();
        self.path = path;
        self.counter = counter;
        self.bytes = 0;
        self.opened = Instant::now();
        Ok(())
    }
}

/// Create the next file; its name sorts after every file already in `dir`.
fn new_file(
    dir: &Path,
    mut counter: u32,
    sync: SyncPolicy,
) -> Result<(BufWriter<File>, PathBuf, u32), Error> {
    let stamp = utc_stamp(unix_now());
    // A name must sort after the newest existing one (clock steps back, same millisecond).
    let newest = std::fs::read_dir(dir)
        .ok()
        .into_iter()
        .flatten()
        .filter_map(|e| e.ok()?.file_name().into_string().ok())
        .filter(|n| n.starts_with("rec-") && n.ends_with(".jsonl"))
        .max();
    loop {
        let mut name = format!("rec-{stamp}-{counter:04}.jsonl");
        if let Some(n) = &newest
            && name.as_str() <= n.as_str()
        {
            // Keep the newest file's stamp and count on from its counter.
            let base = &n[..n.len() - "-NNNN.jsonl".len()];
            let next = n[n.len() - "NNNN.jsonl".len()..n.len() - ".jsonl".len()]
                .parse::<u32>()
                .unwrap_or(0)
                + 1;
            counter = counter.max(next);
            name = format!("{base}-{counter:04}.jsonl");
        }
        let path = dir.join(&name);
        match OpenOptions::new().write(true).create_new(true).open(&path) {
            Ok(f) => {
                if sync != SyncPolicy::None {
                    // Make the new directory entry itself durable.
                    if let Ok(d) = File::open(dir) {
                        let _ = d.sync_all();
                    }
                }
                return Ok((BufWriter::with_capacity(1 << 16, f), path, counter));
            }
            Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => counter += 1,
            Err(e) => {
                return Err(Error::io(
                    format!("cannot create the recording file {}", path.display()),
                    e,
                ));
            }
        }
    }
}

/// The recording files of `dir`, in name order (= time order).
pub fn recording_files(dir: &Path) -> Result<Vec<PathBuf>, Error> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(dir)
        .map_err(|e| Error::io(format!("cannot list {}", dir.display()), e))?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| {
            p.file_name()
                .and_then(|n| n.to_str())
                .is_some_and(|n| n.starts_with("rec-") && n.ends_with(".jsonl"))
        })
        .collect();
    v.sort();
    Ok(v)
}

// ---- reader -------------------------------------------------------------------------------

/// One line of a recording, as [`RecordingReader::next_line`] yields it.
#[derive(Debug, Clone, PartialEq)]
pub enum Line<'a> {
    /// A line to decode as a batch (without its line ending).
    Batch {
        /// 1-based line number.
        number: usize,
        /// The line's text.
        text: &'a str,
    },
    /// A line that cannot be used; `message` says why (report it and skip it).
    Bad {
        /// 1-based line number.
        number: usize,
        /// Why, e.g. `empty line`.
        message: String,
    },
}

/// Reads a recording line by line (see the module doc for what is reported).
#[derive(Debug)]
pub struct RecordingReader<R> {
    input: R,
    buf: Vec<u8>,
    number: usize,
}

impl<R: BufRead> RecordingReader<R> {
    /// A reader of `input`.
    pub fn new(input: R) -> Self {
        Self {
            input,
            buf: Vec::with_capacity(4096),
            number: 0,
        }
    }

    /// Lines read so far.
    pub fn lines(&self) -> usize {
        self.number
    }

    /// The next line, `None` at the end.
    ///
    /// # Errors
    /// [`Error::Io`] if reading fails.
    pub fn next_line(&mut self) -> Result<Option<Line<'_>>, Error> {
        self.buf.clear();
        let n = self
            .input
            .read_until(b'\n', &mut self.buf)
            .map_err(|e| Error::io("cannot read the recording", e))?;
        if n == 0 {
            return Ok(None);
        }
        self.number += 1;
        let number = self.number;
        let complete = self.buf.last() == Some(&b'\n');
        let Ok(text) = std::str::from_utf8(&self.buf) else {
            return Ok(Some(Line::Bad {
                number,
                message: if complete {
                    "not valid UTF-8".into()
                } else {
                    torn(n)
                },
            }));
        };
        let text = text.trim_end_matches(['\n', '\r']);
        if text.trim().is_empty() {
            return Ok(Some(Line::Bad {
                number,
                message: "empty line".into(),
            }));
        }
        if !complete && serde_json::from_str::<serde::de::IgnoredAny>(text).is_err() {
            return Ok(Some(Line::Bad {
                number,
                message: torn(n),
            }));
        }
        Ok(Some(Line::Batch { number, text }))
    }
}

fn torn(bytes: usize) -> String {
    format!(
        "torn last line ({bytes} bytes without a newline at the end of the file, as a crash in the middle of a write leaves it)"
    )
}

/// Read a whole recording, calling `f` for each line; returns the number of lines.
///
/// # Errors
/// [`Error::Io`] if reading fails, or whatever `f` returns.
pub fn read_recording(
    input: impl BufRead,
    mut f: impl FnMut(Line<'_>) -> Result<(), Error>,
) -> Result<usize, Error> {
    let mut r = RecordingReader::new(input);
    while let Some(line) = r.next_line()? {
        f(line)?;
    }
    Ok(r.lines())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn collect(text: &[u8]) -> Vec<String> {
        let mut out = Vec::new();
        read_recording(text, |l| {
            out.push(match l {
                Line::Batch { number, text } => format!("{number} ok {text}"),
                Line::Bad { number, message } => format!("{number} bad {message}"),
            });
            Ok(())
        })
        .unwrap();
        out
    }

    #[test]
    fn torn_last_line_is_reported_and_lines_before_are_intact() {
        let got = collect(b"{\"a\":1}\n\n{\"b\":2}\r\n{\"c\":[1,2");
        assert_eq!(got[0], "1 ok {\"a\":1}");
        assert_eq!(got[1], "2 bad empty line");
        assert_eq!(got[2], "3 ok {\"b\":2}");
        assert!(
            got[3].starts_with("4 bad torn last line (9 bytes"),
            "{}",
            got[3]
        );
        // A complete last line without its newline (hand-edited file) is used.
        assert_eq!(collect(b"{\"a\":1}\n{\"b\":2}")[1], "2 ok {\"b\":2}");
        assert_eq!(collect(b"\xff\xfe\n")[0], "1 bad not valid UTF-8");
    }

    #[test]
    fn record_line_is_one_line_with_recv() {
        let l = record_line(
            "{\"sensor\": \"a\",\n \"seq\": 1, \"time\": 2.5, \"detections\": []}",
            7.25,
        );
        assert!(!l.contains('\n'));
        let v: serde_json::Value = serde_json::from_str(&l).unwrap();
        assert_eq!(v["recv"], 7.25);
        assert_eq!(v["seq"], 1);
    }

    #[test]
    fn utc_stamps_match_known_dates() {
        // 1764600000 s = 2025-12-01 14:40:00 UTC (date(1) -u -d @1764600000); 0 = the epoch;
        // 951782400 = 2000-02-29 00:00:00 UTC, a leap day.
        assert_eq!(utc_stamp(1_764_600_000.25), "20251201T144000.250Z");
        assert_eq!(utc_stamp(0.0), "19700101T000000.000Z");
        assert_eq!(utc_stamp(951_782_400.0), "20000229T000000.000Z");
    }

    #[test]
    fn files_sort_in_time_order_and_rotate_by_size() {
        let dir = std::env::temp_dir().join(format!("pw-rec-unit-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        let rec = Recorder::start(RecordingConfig {
            directory: dir.clone(),
            rotate_bytes: Some(200),
            rotate_seconds: None,
            sync: SyncPolicy::Flush,
        })
        .unwrap();
        let rt = tokio::runtime::Builder::new_current_thread()
            .build()
            .unwrap();
        for k in 0..20 {
            let w = rec.append(
                &format!("{{\"sensor\":\"s\",\"seq\":{k},\"time\":{k},\"detections\":[]}}"),
                1.0,
            );
            rt.block_on(w).unwrap().unwrap();
        }
        rec.shutdown();
        let files = recording_files(&dir).unwrap();
        assert!(files.len() > 3, "{files:?}");
        let mut seqs = Vec::new();
        for f in &files {
            assert!(std::fs::metadata(f).unwrap().len() <= 200);
            let text = std::fs::read_to_string(f).unwrap();
            for l in text.lines() {
                let v: serde_json::Value = serde_json::from_str(l).unwrap();
                seqs.push(v["seq"].as_u64().unwrap());
            }
        }
        assert_eq!(seqs, (0..20).collect::<Vec<u64>>());
        let _ = std::fs::remove_dir_all(&dir);
    }
}
