//! `plotweave simulate`: a scenario file (TOML) into a [`filter_core::sim::Scenario`], and the
//! simulator's scans out as a recording plus a truth file.
//!
//! A scenario describes the *world*: the sensors as they really are and the vessels. Its
//! `[site]` and `[[sensor]]` tables are exactly those of a site configuration (and are read by
//! [`crate::config::parse`], so every key, default and message is the same), with one extra
//! sensor key, `offset` (s, time of the first scan after the start, default 0). Scenario-only
//! sections are `[scenario]` (`duration` s, required; `start` UNIX s, default 1764600000;
//! `seed`, default 1) and `[[target]]`:
//!
//! ```toml
//! [[target]]
//! name = "ferry Marram"
//! birth = 0.0          # s after the start (default 0)
//! death = 900.0        # s after the start (default: the duration)
//! initial = { x = -2000.0, y = 1500.0, vx = 6.0, vy = 0.0 }   # m, m/s, site frame
//! legs = [{ straight = 300.0 }, { turn = 120.0, rate_deg_s = 1.5 }]  # then straight on
//! ```
//!
//! `turn` legs are coordinated turns at `rate_deg_s` degrees per second, **positive clockwise**
//! (a right turn). The tracker's view (`[tracker]`, tokens, limits) belongs in the site
//! configuration that `batch` or `serve` reads, which may well differ from the world.
//!
//! Truth file: one JSON line per scan, `{"time", "sensor", "seq", "objects": [{"name", "x",
//! "y", "vx", "vy"}]}` (every live target, seen or not), matching the recording line of the
//! same `sensor` and `seq`.

use std::io::Write;

use filter_core::sim::{Leg, Scenario, SimSensor, SimTarget, Simulator};
use filter_core::tracker::Measurement;
use serde::{Deserialize, Serialize};

use crate::error::{Error, Problem};
use crate::wire::{BatchWire, DetectionWire};

/// Default start of a scenario, UNIX seconds (2025-12-01 14:40:00 UTC).
pub const DEFAULT_START: f64 = 1_764_600_000.0;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawScenario {
    name: Option<String>,
    start: Option<f64>,
    duration: Option<f64>,
    seed: Option<u64>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawTarget {
    name: Option<String>,
    birth: Option<f64>,
    death: Option<f64>,
    initial: Option<RawState>,
    #[serde(default)]
    legs: Vec<RawLeg>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawState {
    x: f64,
    y: f64,
    vx: f64,
    vy: f64,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawLeg {
    straight: Option<f64>,
    turn: Option<f64>,
    rate_deg_s: Option<f64>,
}

/// A parsed scenario: the simulator's input and the sensor ids.
#[derive(Debug, Clone)]
pub struct ScenarioFile {
    /// Scenario name (`[scenario].name`, else the site name).
    pub name: String,
    /// The simulator's scenario.
    pub scenario: Scenario,
    /// Sensor ids in index order.
    pub ids: Vec<String>,
}

/// Parse and validate a scenario; every problem is listed, each by its key path.
///
/// # Errors
/// [`Error::Config`] naming `source_name` and every broken key.
pub fn parse(text: &str, source_name: &str) -> Result<ScenarioFile, Error> {
    let mut problems = Vec::new();
    let mut add = |path: String, message: String| problems.push(Problem { path, message });
    let config_error = |problems: Vec<Problem>| Error::Config {
        source_name: source_name.to_string(),
        problems,
    };
    let mut doc: toml::Table = text.parse().map_err(|e: toml::de::Error| {
        config_error(vec![Problem {
            path: "(toml syntax)".into(),
            message: e.to_string().trim().to_string(),
        }])
    })?;
    let raw: Option<RawScenario> = match doc.remove("scenario") {
        None => {
            add(
                "scenario".into(),
                "required (a [scenario] table with duration)".into(),
            );
            None
        }
        Some(v) => section(&mut add, "scenario", v),
    };
    let raw_targets = match doc.remove("target") {
        None => Vec::new(),
        Some(toml::Value::Array(items)) => items
            .into_iter()
            .enumerate()
            .map(|(i, v)| section::<RawTarget>(&mut add, &format!("target[{i}]"), v))
            .collect(),
        Some(_) => {
            add(
                "target".into(),
                "must be an array of tables, written [[target]] once per target".into(),
            );
            Vec::new()
        }
    };
    for key in ["tracker", "server"] {
        if doc.remove(key).is_some() {
            add(
                key.into(),
                "not part of a scenario (it describes the world); put it in the site configuration that batch or serve reads".into(),
            );
        }
    }
    let mut offsets = Vec::new();
    if let Some(toml::Value::Array(sensors)) = doc.get_mut("sensor") {
        for (i, s) in sensors.iter_mut().enumerate() {
            let offset = s.as_table_mut().and_then(|t| t.remove("offset"));
            offsets.push(match offset {
                None => 0.0,
                Some(v) => match v.as_float().or_else(|| v.as_integer().map(|i| i as f64)) {
                    Some(o) if o.is_finite() && o >= 0.0 => o,
                    _ => {
                        add(
                            format!("sensor[{i}].offset"),
                            format!("must be a number of seconds >= 0, got {v}"),
                        );
                        0.0
                    }
                },
            });
        }
    }
    // The site part is read by the site configuration's own parser.
    let site_text = toml::to_string(&doc).unwrap_or_default();
    let site = match crate::config::parse(&site_text, source_name, |_| None) {
        Ok(s) => Some(s),
        Err(Error::Config { problems: p, .. }) => {
            problems.extend(p);
            None
        }
        Err(e) => return Err(e),
    };
    let mut add = |path: String, message: String| problems.push(Problem { path, message });

    let (mut name, mut start, mut duration, mut seed) = (None, DEFAULT_START, 0.0, 1);
    if let Some(r) = raw {
        name = r.name;
        if let Some(s) = r.start {
            if s.is_finite() && s >= 0.0 {
                start = s;
            } else {
                add(
                    "scenario.start".into(),
                    format!("must be UNIX seconds >= 0, got {s}"),
                );
            }
        }
        match r.duration {
            None => add("scenario.duration".into(), "required (seconds)".into()),
            Some(d) if d.is_finite() && d > 0.0 && d <= 1.0e7 => duration = d,
            Some(d) => add(
                "scenario.duration".into(),
                format!("must be in (0, 1e7] s, got {d}"),
            ),
        }
        seed = r.seed.unwrap_or(1);
    }
    let mut targets = Vec::new();
    for (i, t) in raw_targets.into_iter().enumerate() {
        let Some(t) = t else { continue };
        let at = |k: &str| format!("target[{i}].{k}");
        let tname = match t.name {
            Some(n) if !n.trim().is_empty() => n,
            _ => {
                add(at("name"), "required (a non-blank name)".into());
                String::new()
            }
        };
        if targets.iter().any(|o: &SimTarget| o.name == tname) && !tname.is_empty() {
            add(
                at("name"),
                format!("{tname:?} is already the name of another target"),
            );
        }
        let birth = t.birth.unwrap_or(0.0);
        let death = t.death.unwrap_or(duration);
        if !(birth.is_finite() && birth >= 0.0) {
            add(at("birth"), format!("must be seconds >= 0, got {birth}"));
        }
        if !(death.is_finite() && death > birth) {
            add(
                at("death"),
                format!("must be after birth ({birth} s), got {death}"),
            );
        }
        let initial = match t.initial {
            None => {
                add(
                    at("initial"),
                    "required ({ x, y, vx, vy } in m and m/s)".into(),
                );
                [0.0; 4]
            }
            Some(s) => {
                let v = [s.x, s.y, s.vx, s.vy];
                if v.iter().any(|c| !c.is_finite()) {
                    add(at("initial"), "every component must be finite".into());
                }
                v
            }
        };
        let mut legs = Vec::new();
        for (j, l) in t.legs.iter().enumerate() {
            let lat = |k: &str| format!("target[{i}].legs[{j}]{k}");
            let ok = |d: f64| d.is_finite() && d >= 0.0;
            match (l.straight, l.turn, l.rate_deg_s) {
                (Some(d), None, None) if ok(d) => legs.push(Leg::Straight { duration: d }),
                (None, Some(d), Some(r)) if ok(d) && r.is_finite() => legs.push(Leg::Turn {
                    duration: d,
                    rate_deg_s: r,
                }),
                (None, Some(_), None) => add(
                    lat(".rate_deg_s"),
                    "required for a turn (degrees per second, positive clockwise)".into(),
                ),
                (Some(_), None, Some(_)) => {
                    add(lat(".rate_deg_s"), "only used with turn".into());
                }
                (Some(_), Some(_), _) => add(
                    lat(""),
                    "a leg is either { straight = s } or { turn = s, rate_deg_s = deg/s }".into(),
                ),
                (None, None, _) => add(
                    lat(""),
                    "needs straight = seconds or turn = seconds (with rate_deg_s)".into(),
                ),
                _ => add(
                    lat(""),
                    "durations must be finite and >= 0, rates finite".into(),
                ),
            }
        }
        targets.push(SimTarget {
            name: tname,
            birth,
            death,
            initial,
            legs,
        });
    }
    let Some(site) = site else {
        return Err(config_error(problems));
    };
    let mut sensors = Vec::new();
    for (i, (c, e)) in site.sensors.iter().zip(&site.sensor_extra).enumerate() {
        match e.period {
            Some(period) => sensors.push(SimSensor {
                config: c.clone(),
                period,
                offset: offsets.get(i).copied().unwrap_or(0.0),
            }),
            None => add(
                format!("sensor[{i}].period"),
                "required in a scenario (scan period, s)".into(),
            ),
        }
    }
    if !problems.is_empty() {
        problems.sort();
        return Err(config_error(problems));
    }
    let scenario = Scenario {
        sensors,
        targets,
        start,
        duration: Some(duration),
        seed,
    };
    scenario.validate().map_err(|e| Error::Core {
        context: format!("{source_name}: invalid scenario"),
        source: e,
    })?;
    Ok(ScenarioFile {
        name: name.unwrap_or_else(|| site.name.clone()),
        ids: site.sensor_ids(),
        scenario,
    })
}

/// Deserialise one section, recording a problem (with its key path) on failure.
fn section<T: for<'de> Deserialize<'de>>(
    add: &mut impl FnMut(String, String),
    path: &str,
    value: toml::Value,
) -> Option<T> {
    match crate::config::deserialize_section(path, value) {
        Ok(v) => Some(v),
        Err((full, message)) => {
            add(full, message);
            None
        }
    }
}

/// One object of a truth line.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TruthObject {
    /// Target name.
    pub name: String,
    /// East, m.
    pub x: f64,
    /// North, m.
    pub y: f64,
    /// East velocity, m/s.
    pub vx: f64,
    /// North velocity, m/s.
    pub vy: f64,
}

/// One truth line: every live target at the time of one scan.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TruthLine {
    /// Scan time, UNIX s.
    pub time: f64,
    /// Sensor id of the scan.
    pub sensor: String,
    /// Its seq.
    pub seq: u64,
    /// Live targets.
    pub objects: Vec<TruthObject>,
}

/// Counts of a simulation.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct SimSummary {
    /// Scans (recording lines) written.
    pub scans: usize,
    /// Detections written (target and clutter).
    pub detections: usize,
}

/// Run the scenario, writing the recording to `recording` and the truth to `truth`.
///
/// # Errors
/// [`Error::Io`] if writing fails; [`Error::Core`] if the simulator refuses the scenario.
pub fn simulate(
    file: &ScenarioFile,
    recording: &mut dyn Write,
    truth: &mut dyn Write,
) -> Result<SimSummary, Error> {
    let sim = Simulator::new(&file.scenario).map_err(|e| Error::Core {
        context: "cannot build the scenario".into(),
        source: e,
    })?;
    let mut summary = SimSummary::default();
    let io = |what: &str| {
        let what = what.to_string();
        move |e| Error::io(format!("cannot write the {what}"), e)
    };
    for s in sim {
        let sensor = file.ids[s.scan.sensor].clone();
        let detections: Vec<DetectionWire> = s
            .scan
            .detections
            .iter()
            .map(|m| match *m {
                Measurement::Cartesian { x, y } => DetectionWire {
                    x: Some(x),
                    y: Some(y),
                    ..Default::default()
                },
                Measurement::Polar {
                    range,
                    bearing_deg,
                    range_rate,
                } => DetectionWire {
                    range: Some(range),
                    // rem_euclid can round up to exactly 360 for a tiny negative angle.
                    bearing: Some(if bearing_deg >= 360.0 {
                        0.0
                    } else {
                        bearing_deg
                    }),
                    range_rate,
                    ..Default::default()
                },
            })
            .collect();
        summary.detections += detections.len();
        let batch = BatchWire {
            sensor: sensor.clone(),
            seq: s.scan.tag,
            time: s.scan.time,
            detections,
        };
        let line =
            serde_json::to_string(&batch).map_err(|e| Error::io("cannot encode", e.into()))?;
        writeln!(recording, "{line}").map_err(io("recording"))?;
        let t = TruthLine {
            time: s.scan.time,
            sensor,
            seq: s.scan.tag,
            objects: s
                .truth
                .iter()
                .map(|(name, x)| TruthObject {
                    name: name.clone(),
                    x: x[0],
                    y: x[1],
                    vx: x[2],
                    vy: x[3],
                })
                .collect(),
        };
        let line = serde_json::to_string(&t).map_err(|e| Error::io("cannot encode", e.into()))?;
        writeln!(truth, "{line}").map_err(io("truth"))?;
        summary.scans += 1;
    }
    recording.flush().map_err(io("recording"))?;
    truth.flush().map_err(io("truth"))?;
    Ok(summary)
}

#[cfg(test)]
mod tests {
    use super::*;

    const SC: &str = r#"
[scenario]
duration = 20.0
seed = 3

[site]
name = "Test Reach"

[[sensor]]
id = "cam"
kind = "cartesian"
noise = { sigma = 2.0 }
fov = { x_min = -500.0, x_max = 500.0, y_min = -500.0, y_max = 500.0 }
detection_probability = 1.0
clutter_rate = 0.0
birth_rate = 0.01
period = 1.0
offset = 0.5

[[target]]
name = "dinghy"
initial = { x = 0.0, y = 0.0, vx = 0.0, vy = 10.0 }
legs = [{ turn = 20.0, rate_deg_s = 9.0 }]
"#;

    #[test]
    fn scenario_parses_and_simulates_deterministically() {
        let f = parse(SC, "t.toml").unwrap();
        assert_eq!(f.scenario.sensors[0].offset, 0.5);
        assert_eq!(f.scenario.targets[0].death, 20.0);
        let run = || {
            let (mut r, mut t) = (Vec::new(), Vec::new());
            let s = simulate(&f, &mut r, &mut t).unwrap();
            (s, r, t)
        };
        let (s, r, t) = run();
        assert_eq!(run(), (s, r.clone(), t.clone()));
        // Scans at 0.5, 1.5, ..., 19.5 s: 20 of them; P_D = 1 and no clutter: one detection each.
        assert_eq!((s.scans, s.detections), (20, 20));
        let last: TruthLine =
            serde_json::from_str(std::str::from_utf8(&t).unwrap().lines().last().unwrap()).unwrap();
        // Clockwise half circle of radius v/ω = 10/(9° in rad) ≈ 63.66 m ends due east of the
        // centre: position (2r, 0) at 20 s (see sim.rs), here sampled at 19.5 s, nearly there.
        assert!(last.objects[0].x > 120.0 && last.objects[0].x < 2.0 * 63.67);
        let line: serde_json::Value =
            serde_json::from_str(std::str::from_utf8(&r).unwrap().lines().next().unwrap()).unwrap();
        assert_eq!(line["sensor"], "cam");
        assert_eq!(line["seq"], 1);
    }

    #[test]
    fn every_scenario_problem_is_named() {
        let bad = SC
            .replace("duration = 20.0", "duration = -1.0\ncolour = 3")
            .replace("offset = 0.5", "offset = -2.0")
            .replace("detection_probability = 1.0", "detection_probability = 1.5")
            .replace("rate_deg_s = 9.0", "speed = 9.0");
        let msg = parse(&bad, "bad.toml").unwrap_err().to_string();
        for key in [
            "scenario.colour: unknown field `colour`",
            "sensor[0].offset: must be a number of seconds >= 0",
            "sensor[0].detection_probability: must be in (0, 1], got 1.5",
            "target[0].legs[0].speed: unknown field `speed`",
        ] {
            assert!(msg.contains(key), "missing {key:?} in {msg}");
        }
        let msg = parse(
            &SC.replace(
                "legs = [{ turn = 20.0, rate_deg_s = 9.0 }]",
                "legs = [{ turn = 20.0 }]",
            ),
            "t",
        )
        .unwrap_err()
        .to_string();
        assert!(
            msg.contains("target[0].legs[0].rate_deg_s: required for a turn"),
            "{msg}"
        );
    }
}
