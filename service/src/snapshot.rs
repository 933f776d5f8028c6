//! Restarts that keep the picture (`[server.snapshot]`): the engine thread periodically hands
//! a snapshot of the tracker to a writer thread, which saves it atomically; at start the
//! service restores the newest snapshot and then applies the batches recorded after it, so
//! that after `kill -9` the picture is the one an uninterrupted run would have.
//!
//! **What a snapshot holds** (one file, CBOR, RFC 8949, so every `f64` is carried exactly):
//! the whole tracker state ([`filter_core::tracker::TrackerSnapshot`]: tracks, candidates, id
//! counter, reorder buffer, health windows, sensor parameters as changed at run time), the
//! sensors as the configuration file had them, the last `seq` and time applied per sensor, and
//! the recording file that was current when it was taken.
//!
//! **Restore** ([`restore`]): the tracker is rebuilt from the snapshot; then every recording
//! file from the snapshot's current file on (in name order, which is time order) is read and
//! each batch whose `seq` is above its sensor's applied `seq` goes through the same admission
//! and engine as live ingest. Admission continues from there, so a reconnecting sensor
//! continues its sequence. A sensor whose settings in the configuration file changed since the
//! snapshot takes the file's settings (the operator's edit wins); otherwise runtime changes
//! made through the admin API survive the restart.
//!
//! **Writing**: to `PATH.tmp`, `fsync`, rename over `PATH`, `fsync` of the directory, so a
//! crash at any moment leaves either the old or the new snapshot, never a torn one. Taking a
//! snapshot costs the engine one copy of the state; encoding and I/O happen on the writer
//! thread. If the writer is still busy with the previous one, the new one is skipped (counted).

use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::mpsc as std_mpsc;
use std::time::{Duration, Instant};

use filter_core::tracker::{SensorConfig, Tracker, TrackerSnapshot};
use serde::{Deserialize, Serialize};

use crate::config::Site;
use crate::error::Error;
use crate::metrics::SnapshotMetrics;
use crate::pipeline::{Admission, Engine};
use crate::record::CurrentFile;
use crate::wire::{self, DecodeLimits};

/// The `[server.snapshot]` section (see `docs/configuration.md`).
#[derive(Debug, Clone, PartialEq)]
pub struct SnapshotConfig {
    /// The snapshot file (its directory must exist or be creatable).
    pub path: PathBuf,
    /// How often a snapshot is taken while batches arrive (default 10 s).
    pub interval: Duration,
}

/// The `format` field of every snapshot file.
const FORMAT: &str = "plotweave-snapshot-1";

/// The last batch applied for one sensor.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Applied {
    /// Its `seq`.
    pub seq: u64,
    /// Its `time`, s since the epoch.
    pub time: f64,
}

/// The content of a snapshot file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
struct SnapshotFile {
    format: String,
    /// Site name, to refuse another site's snapshot.
    site: String,
    /// UNIX seconds when it was taken.
    taken: f64,
    /// The sensors as the configuration file had them when the snapshot was taken.
    configured: Vec<SensorConfig>,
    /// Per sensor (configuration order): the last batch applied.
    applied: Vec<Option<Applied>>,
    /// File name of the recording file current when the snapshot was taken.
    recording_from: Option<String>,
    tracker: TrackerSnapshot,
}

/// What [`restore`] did.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Restored {
    /// Whether a snapshot file was found and used.
    pub from_snapshot: bool,
    /// Batches re-applied from the recording.
    pub replayed: u64,
    /// Recording lines skipped as unusable (e.g. a line torn by the crash), each logged.
    pub skipped: u64,
    /// Per sensor: the last batch applied after the restore (the snapshotter continues it).
    pub applied: Vec<Option<Applied>>,
}

/// Restore `engine` and `admission` from the snapshot of `site` (if its file exists) and the
/// recording after it. Call before the recorder starts (its new file then sorts after every
/// file read here). Frames of re-applied batches go to `publish`.
///
/// # Errors
/// [`Error::Snapshot`] naming the file and what is wrong with it (unreadable, not a snapshot,
/// another site's, sensors that differ from the configuration, an inconsistent state), and
/// [`Error::Io`] for a recording that cannot be read. The service does not start on a bad
/// snapshot: move the file away to start with an empty picture.
pub fn restore(
    site: &Site,
    engine: &mut Engine,
    admission: &mut Admission,
    publish: &mut dyn FnMut(filter_core::tracker::Picture, &str),
) -> Result<Restored, Error> {
    let mut out = Restored {
        applied: vec![None; site.sensors.len()],
        ..Restored::default()
    };
    let Some(config) = &site.server.snapshot else {
        return Ok(out);
    };
    let path = &config.path;
    let bytes = match std::fs::read(path) {
        Ok(b) => b,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            tracing::info!(snapshot = %path.display(), "no snapshot yet: starting with an empty picture");
            return Ok(out);
        }
        Err(e) => {
            return Err(Error::io(
                format!("cannot read the snapshot {}", path.display()),
                e,
            ));
        }
    };
    let bad = |what: String| Error::Snapshot {
        path: path.clone(),
        message: what,
    };
    let file: SnapshotFile = ciborium::from_reader(bytes.as_slice())
        .map_err(|e| bad(format!("not a readable snapshot ({e})")))?;
    if file.format != FORMAT {
        return Err(bad(format!(
            "format {:?}, this version reads {FORMAT:?}",
            file.format
        )));
    }
    if file.site != site.name {
        return Err(bad(format!(
            "taken for site {:?}, the configuration is site {:?}",
            file.site, site.name
        )));
    }
    let ids: Vec<&str> = site.sensors.iter().map(|s| s.id.as_str()).collect();
    let snap_ids: Vec<&str> = file.tracker.sensors.iter().map(|s| s.id.as_str()).collect();
    if ids != snap_ids || file.configured.len() != ids.len() || file.applied.len() != ids.len() {
        return Err(bad(format!(
            "taken with sensors {snap_ids:?}, the configuration has {ids:?} (same ids in the same order needed)"
        )));
    }
    let mut tracker_snap = file.tracker;
    for (i, now) in site.sensors.iter().enumerate() {
        if *now != file.configured[i] {
            tracing::info!(sensor = %now.id, "sensor settings changed in the configuration since the snapshot: the file's settings apply");
            tracker_snap.sensors[i] = now.clone();
        }
    }
    let tracker =
        Tracker::restore(site.tracker.clone(), tracker_snap).map_err(|e| bad(e.to_string()))?;
    engine.restore_tracker(tracker);
    for (i, a) in file.applied.iter().enumerate() {
        if let Some(a) = a {
            admission.resume(i, a.seq, a.time);
        }
    }
    out.applied = file.applied.clone();
    out.from_snapshot = true;
    // The batches recorded after the snapshot.
    if let (Some(rec), Some(from)) = (&site.server.recording, &file.recording_from) {
        let limits = DecodeLimits {
            max_detections: site.server.limits.max_detections,
        };
        for f in crate::record::recording_files(&rec.directory)? {
            let name = f.file_name().and_then(|n| n.to_str()).unwrap_or_default();
            if name < from.as_str() {
                continue;
            }
            replay_file(
                site,
                &f,
                limits,
                &file.applied,
                engine,
                admission,
                publish,
                &mut out,
            )?;
        }
    }
    tracing::info!(
        snapshot = %path.display(),
        taken = file.taken,
        tracks = engine.tracker().picture().len(),
        replayed = out.replayed,
        skipped = out.skipped,
        "picture restored"
    );
    Ok(out)
}

/// Re-apply the batches of recording file `f` that the snapshot does not hold.
#[allow(clippy::too_many_arguments)]
fn replay_file(
    site: &Site,
    f: &Path,
    limits: DecodeLimits,
    in_snapshot: &[Option<Applied>],
    engine: &mut Engine,
    admission: &mut Admission,
    publish: &mut dyn FnMut(filter_core::tracker::Picture, &str),
    out: &mut Restored,
) -> Result<(), Error> {
    let file = std::fs::File::open(f)
        .map_err(|e| Error::io(format!("cannot open the recording {}", f.display()), e))?;
    let mut input = std::io::BufReader::new(file);
    let mut reader = crate::record::RecordingReader::new(&mut input);
    while let Some(line) = reader.next_line()? {
        let text = match line {
            crate::record::Line::Batch { text, .. } => text,
            crate::record::Line::Bad { number, message } => {
                tracing::warn!(file = %f.display(), line = number, "{message}; not re-applied");
                out.skipped += 1;
                continue;
            }
        };
        let scan = match wire::decode_batch(text, &site.sensors, limits) {
            Ok(s) => s,
            Err(r) => {
                tracing::warn!(file = %f.display(), "{}; not re-applied", r.message);
                out.skipped += 1;
                continue;
            }
        };
        if in_snapshot[scan.sensor].is_some_and(|a| scan.tag <= a.seq) {
            continue;
        }
        if let Err(r) = admission.admit(&scan, None) {
            tracing::warn!(file = %f.display(), "{}; not re-applied", r.message);
            out.skipped += 1;
            continue;
        }
        let (sensor, seq, time) = (scan.sensor, scan.tag, scan.time);
        if let Err(e) = engine.submit(scan, None, publish) {
            tracing::warn!(file = %f.display(), seq, "the tracker refused a recorded batch: {e}");
            out.skipped += 1;
            continue;
        }
        out.applied[sensor] = Some(Applied { seq, time });
        out.replayed += 1;
    }
    Ok(())
}

/// The engine thread's side of snapshots: it notes each applied batch and, every
/// `interval`, hands a copy of the state to the writer thread.
pub struct Snapshotter {
    interval: Duration,
    /// When the last snapshot was taken (`None`: none yet in this process).
    last: Option<Instant>,
    site: String,
    configured: Vec<SensorConfig>,
    applied: Vec<Option<Applied>>,
    recording: Option<CurrentFile>,
    tx: Option<std_mpsc::SyncSender<SnapshotFile>>,
    thread: Option<std::thread::JoinHandle<()>>,
    metrics: SnapshotMetrics,
    dirty: bool,
}

impl std::fmt::Debug for Snapshotter {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Snapshotter")
            .field("interval", &self.interval)
            .finish_non_exhaustive()
    }
}

impl Snapshotter {
    /// Start the writer thread for `config`, continuing from `restored`.
    ///
    /// # Errors
    /// [`Error::Io`] if the snapshot's directory cannot be created or the thread not started.
    pub fn start(
        site: &Site,
        config: &SnapshotConfig,
        recording: Option<CurrentFile>,
        restored: &Restored,
        metrics: SnapshotMetrics,
    ) -> Result<Snapshotter, Error> {
        if let Some(dir) = config.path.parent().filter(|d| !d.as_os_str().is_empty()) {
            std::fs::create_dir_all(dir).map_err(|e| {
                Error::io(
                    format!("cannot create the snapshot directory {}", dir.display()),
                    e,
                )
            })?;
        }
        let (tx, rx) = std_mpsc::sync_channel::<SnapshotFile>(1);
        let path = config.path.clone();
        let m = metrics.clone();
        let thread = std::thread::Builder::new()
            .name("plotweave-snapshot".into())
            .spawn(move || {
                while let Ok(file) = rx.recv() {
                    write_snapshot(&path, &file, &m);
                }
            })
            .map_err(|e| Error::io("cannot start the snapshot thread", e))?;
        Ok(Snapshotter {
            interval: config.interval,
            last: None,
            site: site.name.clone(),
            configured: site.sensors.clone(),
            applied: restored.applied.clone(),
            recording,
            tx: Some(tx),
            thread: Some(thread),
            metrics,
            // The first snapshot is taken at once: from then on a restart restores.
            dirty: true,
        })
    }

    /// Batch `seq` at `time` of sensor `sensor` was applied.
    pub fn applied(&mut self, sensor: usize, seq: u64, time: f64) {
        self.applied[sensor] = Some(Applied { seq, time });
        self.dirty = true;
    }

    /// Something besides a batch changed the state (a runtime parameter change).
    pub fn changed(&mut self) {
        self.dirty = true;
    }

    /// Take a snapshot of `tracker` if one is due (the interval has passed and something
    /// changed, or this is the first call).
    pub fn tick(&mut self, tracker: &Tracker) {
        if self.dirty && self.last.is_none_or(|t| t.elapsed() >= self.interval) {
            self.take(tracker);
        }
    }

    fn build(&self, tracker: &Tracker) -> SnapshotFile {
        SnapshotFile {
            format: FORMAT.into(),
            site: self.site.clone(),
            taken: crate::record::unix_now(),
            configured: self.configured.clone(),
            applied: self.applied.clone(),
            recording_from: self.recording.as_ref().and_then(|c| {
                c.get()
                    .file_name()
                    .and_then(|n| n.to_str())
                    .map(str::to_string)
            }),
            tracker: tracker.snapshot(),
        }
    }

    fn take(&mut self, tracker: &Tracker) {
        let file = self.build(tracker);
        self.last = Some(Instant::now());
        self.dirty = false;
        self.metrics.taken.inc();
        if let Some(tx) = &self.tx
            && let Err(std_mpsc::TrySendError::Full(_)) = tx.try_send(file)
        {
            self.metrics.skipped.inc();
            // Try again at the next batch rather than a whole interval later.
            self.dirty = true;
        }
    }

    /// A last snapshot of `tracker` (shutdown, after the reorder buffer was flushed), written
    /// before this returns.
    pub fn finish(mut self, tracker: &Tracker) {
        let file = self.build(tracker);
        self.metrics.taken.inc();
        if let Some(tx) = self.tx.take() {
            // Waits while the previous snapshot is still being written.
            let _ = tx.send(file);
        }
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

/// Write `file` to `path` atomically (temporary file, fsync, rename, fsync of the directory).
fn write_snapshot(path: &Path, file: &SnapshotFile, m: &SnapshotMetrics) {
    let started = Instant::now();
    let mut bytes = Vec::with_capacity(64 * 1024);
    let result = ciborium::into_writer(file, &mut bytes)
        .map_err(|e| std::io::Error::other(e.to_string()))
        .and_then(|()| {
            let tmp = path.with_extension("tmp");
            let mut f = std::fs::File::create(&tmp)?;
            f.write_all(&bytes)?;
            f.sync_all()?;
            drop(f);
            std::fs::rename(&tmp, path)?;
            if let Some(dir) = path.parent().filter(|d| !d.as_os_str().is_empty())
                && let Ok(d) = std::fs::File::open(dir)
            {
                d.sync_all()?;
            }
            Ok(())
        });
    match result {
        Ok(()) => {
            m.written.inc();
            m.bytes.set(bytes.len() as i64);
            m.last_success.set(crate::record::unix_now());
            m.seconds.observe(started.elapsed().as_secs_f64());
        }
        Err(e) => {
            m.failed.inc();
            tracing::error!(snapshot = %path.display(), error = %e, "cannot write the snapshot; the previous one stays");
        }
    }
}
