//! `plotweave score`: track frames against the truth of a simulated scenario.
//!
//! Each frame is paired with the truth line of the same `sensor` and `seq` (the scan that made
//! it, so both are at the same time). The estimates are the frame's **confirmed** tracks (a
//! tentative track is not yet a claim that an object is there); the truths are every live
//! target of that truth line.
//!
//! # Per frame: GOSPA
//! [`filter_core::gospa::gospa`] with α = 2, order `p` = 2 and cut-off `c` (default 50 m):
//! `d² = localisation + missed + false`, with `localisation = Σ‖x − y‖²` over the optimal pairs
//! (m²), `missed = (c²/2)·#missed` and `false = (c²/2)·#false` (Rahmathullah,
//! García-Fernández & Svensson, "Generalized optimal sub-pattern assignment metric", FUSION
//! 2017, cited from memory). The summary gives the mean of `d` over the frames and the mean of
//! each part.
//!
//! # Over time: id switches and track breaks
//! Counted on the GOSPA pairs of each frame, in frame order, following the mismatch count of
//! the CLEAR MOT metrics (Bernardin & Stiefelhagen, "Evaluating multiple object tracking
//! performance: the CLEAR MOT metrics", EURASIP J. Image and Video Processing, 2008, cited from
//! memory) and the fragmentation count commonly reported beside it:
//! * an **id switch** is a frame in which an object is paired with a track id other than the
//!   one it was last paired with (in any earlier frame; gaps in between do not reset it);
//! * a **track break** is a frame in which an object that was paired in its previous frame is
//!   alive but unpaired (its track was lost, deleted, or drifted beyond `c`).
//!
//! A new object's first pairing is neither. Objects are named by the truth's `name`.

use std::collections::{BTreeMap, HashMap};
use std::io::BufRead;
use std::path::Path;

use filter_core::gospa::{GospaParams, gospa};
use serde::Serialize;

use crate::error::Error;
use crate::scenario::TruthLine;
use crate::wire::FrameWire;

/// Default GOSPA cut-off, metres.
pub const DEFAULT_CUTOFF: f64 = 50.0;

/// The score of one frame.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FrameScore {
    /// Frame time, UNIX s.
    pub time: f64,
    /// Sensor of the batch.
    pub sensor: String,
    /// Its seq.
    pub seq: u64,
    /// GOSPA distance d, m.
    pub gospa: f64,
    /// Localisation part, m².
    pub localisation: f64,
    /// Missed part, m².
    pub missed: f64,
    /// False-track part, m².
    pub false_tracks: f64,
    /// Live truth objects.
    pub objects: usize,
    /// Confirmed tracks.
    pub tracks: usize,
    /// Objects left unpaired.
    pub n_missed: usize,
    /// Tracks left unpaired.
    pub n_false: usize,
}

/// The whole score.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Score {
    /// Cut-off c, m.
    pub cutoff: f64,
    /// Order p.
    pub p: f64,
    /// Frames scored.
    pub frames: usize,
    /// Truth lines with no frame (their batch was not used).
    pub unscored_scans: usize,
    /// Mean GOSPA d over the frames, m.
    pub mean_gospa: f64,
    /// Mean localisation part, m².
    pub mean_localisation: f64,
    /// Mean missed part, m².
    pub mean_missed: f64,
    /// Mean false-track part, m².
    pub mean_false: f64,
    /// Root mean square distance of the GOSPA pairs, m.
    pub rms_position_error: f64,
    /// Id switches (see the module doc).
    pub id_switches: usize,
    /// Track breaks (see the module doc).
    pub track_breaks: usize,
    /// Every frame's score.
    pub per_frame: Vec<FrameScore>,
}

/// What the plot needs: truth paths and confirmed track positions.
#[derive(Debug, Clone, Default)]
pub struct Paths {
    /// Truth positions per object name, in time order.
    pub truth: BTreeMap<String, Vec<(f64, f64)>>,
    /// Confirmed track positions per track id, in time order.
    pub tracks: BTreeMap<u64, Vec<(f64, f64)>>,
}

fn open(path: &Path, what: &str) -> Result<std::io::BufReader<std::fs::File>, Error> {
    std::fs::File::open(path)
        .map(std::io::BufReader::new)
        .map_err(|e| Error::io(format!("cannot open the {what} {}", path.display()), e))
}

fn bad_line(path: &Path, number: usize, message: impl std::fmt::Display) -> Error {
    Error::Usage(format!("{} line {number}: {message}", path.display()))
}

/// Read a truth file into `(sensor, seq)` → line.
///
/// # Errors
/// [`Error::Io`] if it cannot be read; [`Error::Usage`] naming the file and line of the first
/// line that is not a truth line, or a repeated `(sensor, seq)`.
pub fn read_truth(path: &Path) -> Result<BTreeMap<(String, u64), TruthLine>, Error> {
    let mut out = BTreeMap::new();
    for (i, line) in open(path, "truth file")?.lines().enumerate() {
        let line = line.map_err(|e| Error::io(format!("cannot read {}", path.display()), e))?;
        if line.trim().is_empty() {
            continue;
        }
        let t: TruthLine = serde_json::from_str(&line)
            .map_err(|e| bad_line(path, i + 1, format!("not a truth line: {e}")))?;
        let key = (t.sensor.clone(), t.seq);
        if out.insert(key, t).is_some() {
            return Err(bad_line(
                path,
                i + 1,
                "repeats the sensor and seq of an earlier line",
            ));
        }
    }
    Ok(out)
}

/// Score the frames file against the truth file.
///
/// # Errors
/// [`Error::Io`] for unreadable files; [`Error::Usage`] naming file and line for a bad line or
/// a frame whose scan is not in the truth; [`Error::Core`] for an invalid cut-off.
pub fn score(truth_path: &Path, frames_path: &Path, cutoff: f64) -> Result<(Score, Paths), Error> {
    let params = GospaParams::new(cutoff, 2.0).map_err(|e| Error::Core {
        context: "--cutoff".into(),
        source: e,
    })?;
    let truth = read_truth(truth_path)?;
    let mut per_frame = Vec::new();
    let mut paths = Paths::default();
    let mut used = 0usize;
    let (mut pairs, mut pair_sq) = (0usize, 0.0);
    // Per object: (id it was last paired with, paired in its previous frame).
    let mut last: HashMap<String, (Option<u64>, bool)> = HashMap::new();
    let (mut switches, mut breaks) = (0, 0);
    for (i, line) in open(frames_path, "frames file")?.lines().enumerate() {
        let number = i + 1;
        let line =
            line.map_err(|e| Error::io(format!("cannot read {}", frames_path.display()), e))?;
        if line.trim().is_empty() {
            continue;
        }
        let f: FrameWire = serde_json::from_str(&line)
            .map_err(|e| bad_line(frames_path, number, format!("not a track frame: {e}")))?;
        let Some(t) = truth.get(&(f.sensor.clone(), f.seq)) else {
            return Err(bad_line(
                frames_path,
                number,
                format!(
                    "frame of sensor {:?} seq {} has no truth line in {} (are these frames from this scenario's recording?)",
                    f.sensor,
                    f.seq,
                    truth_path.display()
                ),
            ));
        };
        used += 1;
        let objects: Vec<[f64; 2]> = t.objects.iter().map(|o| [o.x, o.y]).collect();
        let mut ids = Vec::new();
        let mut estimates = Vec::new();
        for tr in f.tracks.iter().filter(|tr| tr.status == "confirmed") {
            let (Some(x), Some(y)) = (tr.x, tr.y) else {
                return Err(bad_line(
                    frames_path,
                    number,
                    format!("track {} has no position", tr.id),
                ));
            };
            ids.push(tr.id);
            estimates.push([x, y]);
            paths.tracks.entry(tr.id).or_default().push((x, y));
        }
        let g = gospa(&objects, &estimates, &params).map_err(|e| Error::Core {
            context: format!("{} line {number}", frames_path.display()),
            source: e,
        })?;
        for (o, a) in t.objects.iter().zip(&g.assignment) {
            paths
                .truth
                .entry(o.name.clone())
                .or_default()
                .push((o.x, o.y));
            let entry = last.entry(o.name.clone()).or_insert((None, false));
            match a {
                Some(j) => {
                    let id = ids[*j];
                    if entry.0.is_some_and(|prev| prev != id) {
                        switches += 1;
                    }
                    let (dx, dy) = (o.x - estimates[*j][0], o.y - estimates[*j][1]);
                    pair_sq += dx.mul_add(dx, dy * dy);
                    pairs += 1;
                    *entry = (Some(id), true);
                }
                None => {
                    if entry.1 {
                        breaks += 1;
                    }
                    entry.1 = false;
                }
            }
        }
        per_frame.push(FrameScore {
            time: f.time.unwrap_or(t.time),
            sensor: f.sensor,
            seq: f.seq,
            gospa: g.distance,
            localisation: g.localisation,
            missed: g.missed,
            false_tracks: g.false_tracks,
            objects: objects.len(),
            tracks: estimates.len(),
            n_missed: g.n_missed,
            n_false: g.n_false,
        });
    }
    if per_frame.is_empty() {
        return Err(Error::Usage(format!(
            "{} holds no frames to score",
            frames_path.display()
        )));
    }
    let n = per_frame.len() as f64;
    let mean = |f: fn(&FrameScore) -> f64| per_frame.iter().map(f).sum::<f64>() / n;
    let s = Score {
        cutoff,
        p: 2.0,
        frames: per_frame.len(),
        unscored_scans: truth.len().saturating_sub(used),
        mean_gospa: mean(|f| f.gospa),
        mean_localisation: mean(|f| f.localisation),
        mean_missed: mean(|f| f.missed),
        mean_false: mean(|f| f.false_tracks),
        rms_position_error: if pairs > 0 {
            (pair_sq / pairs as f64).sqrt()
        } else {
            0.0
        },
        id_switches: switches,
        track_breaks: breaks,
        per_frame,
    };
    Ok((s, paths))
}

/// The summary table printed by `plotweave score`.
pub fn table(s: &Score) -> String {
    let mut out = String::new();
    let rows: [(&str, String); 10] = [
        ("frames scored", s.frames.to_string()),
        ("truth scans without a frame", s.unscored_scans.to_string()),
        (
            "mean GOSPA d (m)",
            format!(
                "{:.3}  (c = {} m, p = 2, alpha = 2)",
                s.mean_gospa, s.cutoff
            ),
        ),
        (
            "mean localisation part (m^2)",
            format!("{:.1}", s.mean_localisation),
        ),
        ("mean missed part (m^2)", format!("{:.1}", s.mean_missed)),
        (
            "mean false-track part (m^2)",
            format!("{:.1}", s.mean_false),
        ),
        (
            "RMS error of the pairs (m)",
            format!("{:.3}", s.rms_position_error),
        ),
        ("id switches", s.id_switches.to_string()),
        ("track breaks", s.track_breaks.to_string()),
        (
            "mean objects / confirmed tracks",
            format!(
                "{:.2} / {:.2}",
                s.per_frame.iter().map(|f| f.objects).sum::<usize>() as f64 / s.frames as f64,
                s.per_frame.iter().map(|f| f.tracks).sum::<usize>() as f64 / s.frames as f64
            ),
        ),
    ];
    for (k, v) in rows {
        out.push_str(&format!("{k:<32} {v}\n"));
    }
    out
}

/// Draw the plan view (truth paths as lines, confirmed track positions as dots) above GOSPA
/// over time, as SVG (no fonts needed: the SVG viewer renders the text).
///
/// # Errors
/// [`Error::Io`] if the file cannot be written.
pub fn plot(path: &Path, s: &Score, paths: &Paths) -> Result<(), Error> {
    use plotters::prelude::*;
    let fail = |e: &dyn std::fmt::Display| {
        Error::io(
            format!("cannot draw {}", path.display()),
            std::io::Error::other(e.to_string()),
        )
    };
    let root = SVGBackend::new(path, (1000, 1300)).into_drawing_area();
    root.fill(&WHITE).map_err(|e| fail(&e))?;
    let (top, bottom) = root.split_vertically(900);
    let all = paths.truth.values().chain(paths.tracks.values()).flatten();
    let (mut x0, mut x1, mut y0, mut y1) = (f64::MAX, f64::MIN, f64::MAX, f64::MIN);
    for &(x, y) in all {
        x0 = x0.min(x);
        x1 = x1.max(x);
        y0 = y0.min(y);
        y1 = y1.max(y);
    }
    if x0 > x1 {
        (x0, x1, y0, y1) = (-1.0, 1.0, -1.0, 1.0);
    }
    // Equal scales on both axes: pad the shorter extent.
    let span = (x1 - x0).max(y1 - y0).max(1.0) * 1.05;
    let (cx, cy) = ((x0 + x1) / 2.0, (y0 + y1) / 2.0);
    let mut plan = ChartBuilder::on(&top)
        .caption(
            "plan view: truth (lines) and confirmed tracks (dots)",
            ("sans-serif", 22),
        )
        .margin(15)
        .x_label_area_size(40)
        .y_label_area_size(60)
        .build_cartesian_2d(
            cx - span / 2.0..cx + span / 2.0,
            cy - span / 2.0..cy + span / 2.0,
        )
        .map_err(|e| fail(&e))?;
    plan.configure_mesh()
        .x_desc("east (m)")
        .y_desc("north (m)")
        .draw()
        .map_err(|e| fail(&e))?;
    for (k, (id, pts)) in paths.tracks.iter().enumerate() {
        let colour = Palette99::pick(k).mix(0.8);
        plan.draw_series(
            pts.iter()
                .map(|&(x, y)| Circle::new((x, y), 2, colour.filled())),
        )
        .map_err(|e| fail(&e))?
        .label(format!("track {id}"));
    }
    for (name, pts) in &paths.truth {
        plan.draw_series(LineSeries::new(pts.iter().copied(), BLACK.stroke_width(1)))
            .map_err(|e| fail(&e))?;
        if let Some(&(x, y)) = pts.first() {
            plan.draw_series(std::iter::once(Text::new(
                name.clone(),
                (x, y),
                ("sans-serif", 14),
            )))
            .map_err(|e| fail(&e))?;
        }
    }
    let t0 = s.per_frame.first().map_or(0.0, |f| f.time);
    let t1 = s.per_frame.last().map_or(1.0, |f| f.time).max(t0 + 1.0);
    let dmax = s.per_frame.iter().map(|f| f.gospa).fold(1.0, f64::max) * 1.05;
    let mut time = ChartBuilder::on(&bottom)
        .caption(
            format!(
                "GOSPA over time (c = {} m, p = 2): mean {:.2} m",
                s.cutoff, s.mean_gospa
            ),
            ("sans-serif", 20),
        )
        .margin(15)
        .x_label_area_size(40)
        .y_label_area_size(60)
        .build_cartesian_2d(0.0..t1 - t0, 0.0..dmax)
        .map_err(|e| fail(&e))?;
    time.configure_mesh()
        .x_desc("time since the first frame (s)")
        .y_desc("GOSPA d (m)")
        .draw()
        .map_err(|e| fail(&e))?;
    time.draw_series(LineSeries::new(
        s.per_frame.iter().map(|f| (f.time - t0, f.gospa)),
        BLUE.stroke_width(1),
    ))
    .map_err(|e| fail(&e))?;
    root.present().map_err(|e| fail(&e))?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn write(dir: &Path, name: &str, text: &str) -> std::path::PathBuf {
        let p = dir.join(name);
        std::fs::write(&p, text).unwrap();
        p
    }

    /// Two objects, three frames, hand-computed: the values follow from the GOSPA definition
    /// (check-values.md §7 gives the same formula) with c = 10.
    #[test]
    fn gospa_parts_switches_and_breaks_by_hand() {
        let dir = std::env::temp_dir().join(format!("pw-score-unit-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let obj =
            |n: &str, x: f64| format!(r#"{{"name":"{n}","x":{x},"y":0.0,"vx":0.0,"vy":0.0}}"#);
        let truth = (1..=3)
            .map(|k| {
                format!(
                    r#"{{"time":{k}.0,"sensor":"s","seq":{k},"objects":[{},{}]}}"#,
                    obj("a", 0.0),
                    obj("b", 100.0)
                )
            })
            .collect::<Vec<_>>()
            .join("\n");
        let tr = |id: u64, x: f64, st: &str| {
            format!(
                r#"{{"id":{id},"status":"{st}","x":{x},"y":0.0,"vx":0.0,"vy":0.0,"sensors":[],"cov":[]}}"#
            )
        };
        let frames = [
            // a paired with 1 at 3 m, b paired with 2 at 4 m; a tentative track ignored.
            format!(
                r#"{{"time":1.0,"sensor":"s","seq":1,"tracks":[{},{},{}],"ended":[]}}"#,
                tr(1, 3.0, "confirmed"),
                tr(2, 104.0, "confirmed"),
                tr(9, 50.0, "tentative")
            ),
            // a unpaired (track 1 at 20 m > c): a break, one missed, one false.
            format!(
                r#"{{"time":2.0,"sensor":"s","seq":2,"tracks":[{},{}],"ended":[]}}"#,
                tr(1, 20.0, "confirmed"),
                tr(2, 100.0, "confirmed")
            ),
            // a paired with track 3: an id switch (last paired with 1).
            format!(
                r#"{{"time":3.0,"sensor":"s","seq":3,"tracks":[{},{}],"ended":[1]}}"#,
                tr(3, 0.0, "confirmed"),
                tr(2, 100.0, "confirmed")
            ),
        ]
        .join("\n");
        let tp = write(&dir, "truth.jsonl", &truth);
        let fp = write(&dir, "frames.jsonl", &frames);
        let (s, paths) = score(&tp, &fp, 10.0).unwrap();
        assert_eq!(s.frames, 3);
        // frame 1: loc = 9 + 16 = 25, d = 5.
        assert_eq!(s.per_frame[0].localisation, 25.0);
        assert_eq!(s.per_frame[0].gospa, 5.0);
        // frame 2: loc 0, missed 50, false 50, d = 10.
        assert_eq!(
            (s.per_frame[1].missed, s.per_frame[1].false_tracks),
            (50.0, 50.0)
        );
        assert_eq!(s.per_frame[1].gospa, 10.0);
        assert_eq!(s.per_frame[2].gospa, 0.0);
        assert_eq!((s.id_switches, s.track_breaks), (1, 1));
        assert!((s.mean_gospa - 5.0).abs() < 1e-12);
        // pairs: 3, 4, 0, 0, 0 m → RMS = sqrt(25 / 5).
        assert!((s.rms_position_error - 5f64.sqrt()).abs() < 1e-12);
        assert!(table(&s).contains("id switches"));
        let svg = dir.join("p.svg");
        plot(&svg, &s, &paths).unwrap();
        let text = std::fs::read_to_string(&svg).unwrap();
        // The text is in the SVG as <text> elements (no font files were needed to place it).
        assert!(
            text.contains("<text") && text.contains("GOSPA over time"),
            "no text in the SVG"
        );
        // A frame of a scan that the truth lacks is named with its line.
        let fp2 = write(
            &dir,
            "frames2.jsonl",
            r#"{"time":9.0,"sensor":"s","seq":9,"tracks":[],"ended":[]}"#,
        );
        let e = score(&tp, &fp2, 10.0).unwrap_err().to_string();
        assert!(
            e.contains("frames2.jsonl line 1: frame of sensor \"s\" seq 9 has no truth line"),
            "{e}"
        );
        let _ = std::fs::remove_dir_all(&dir);
    }
}
