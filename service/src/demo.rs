//! `plotweave demo`: the embedded "Kestrel Bay" site fed in real time by the core's
//! `Simulator`, through exactly the path ingest uses ([`AppState::submit`]), and counted in the
//! same ingest metrics (`batches_received`, `batches_acked`, `detections`, rejections).
//!
//! The vessels are invented: a ferry on a racetrack across the harbour mouth, a pilot boat on
//! a square patrol in front of the camera, a trawler working slowly back and forth, and a yacht
//! that passes through once (so births and track ends show too). Scan times are UNIX seconds
//! from the moment the demo starts; each scan is released when the wall clock reaches it.

use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use filter_core::sim::{Leg, Scenario, SimSensor, SimTarget, Simulator};

use crate::config::Site;
use crate::error::Error;
use crate::server::AppState;

/// Seed of the demo's simulator (fixed, so every demo run draws the same noise and clutter).
pub const DEMO_SEED: u64 = 0x4b45_5354;

/// How long the demo vessels keep sailing, s (about 11 days).
const DEMO_LIFETIME: f64 = 1.0e6;

fn repeat(pattern: &[Leg], times: usize) -> Vec<Leg> {
    pattern
        .iter()
        .copied()
        .cycle()
        .take(pattern.len() * times)
        .collect()
}

/// The demo scenario on `site`, starting at `start` (UNIX seconds).
pub fn scenario(site: &Site, start: f64) -> Result<Scenario, Error> {
    let sensors = site
        .sensors
        .iter()
        .zip(&site.sensor_extra)
        .enumerate()
        .map(|(i, (c, e))| {
            let period = e.period.ok_or_else(|| {
                Error::Usage(format!(
                    "sensor[{i}].period is required to simulate sensor {:?}",
                    c.id
                ))
            })?;
            Ok(SimSensor {
                config: c.clone(),
                period,
                offset: 0.2 + 0.35 * i as f64,
            })
        })
        .collect::<Result<Vec<_>, Error>>()?;
    let targets = vec![
        SimTarget {
            name: "ferry Marram".into(),
            birth: 0.0,
            death: DEMO_LIFETIME,
            initial: [-2000.0, 1500.0, 6.0, 0.0],
            legs: repeat(
                &[
                    Leg::Straight { duration: 600.0 },
                    Leg::Turn {
                        duration: 180.0,
                        rate_deg_s: 1.0,
                    },
                ],
                1200,
            ),
        },
        SimTarget {
            name: "pilot boat Tern".into(),
            birth: 0.0,
            death: DEMO_LIFETIME,
            initial: [-800.0, 2100.0, 9.0, 0.0],
            legs: repeat(
                &[
                    Leg::Straight { duration: 150.0 },
                    Leg::Turn {
                        duration: 30.0,
                        rate_deg_s: 3.0,
                    },
                ],
                5000,
            ),
        },
        SimTarget {
            name: "trawler Skua".into(),
            birth: 0.0,
            death: DEMO_LIFETIME,
            initial: [2500.0, 3500.0, -2.1, -2.1],
            legs: repeat(
                &[
                    Leg::Straight { duration: 1200.0 },
                    Leg::Turn {
                        duration: 360.0,
                        rate_deg_s: 0.5,
                    },
                ],
                600,
            ),
        },
        SimTarget {
            name: "yacht Whimbrel".into(),
            birth: 120.0,
            death: 1500.0,
            initial: [-3000.0, 3000.0, 4.0, -1.0],
            legs: Vec::new(),
        },
    ];
    Ok(Scenario {
        sensors,
        targets,
        start,
        duration: None,
        seed: DEMO_SEED,
    })
}

/// Seconds since the UNIX epoch now.
pub fn unix_now() -> f64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0.0, |d| d.as_secs_f64())
}

/// Start the task that feeds the simulator's scans into `state` in real time until shutdown.
pub fn spawn_feeder(state: &AppState) -> Result<(), Error> {
    let start = unix_now();
    let scenario = scenario(state.site(), start)?;
    let sim = Simulator::new(&scenario).map_err(|e| Error::Core {
        context: "cannot build the demo scenario".into(),
        source: e,
    })?;
    let state2 = state.clone();
    let cancel = state.cancel_token();
    let t0 = Instant::now();
    state.0.producers.spawn(async move {
        for sim_scan in sim {
            let scan = sim_scan.scan;
            let due = t0 + Duration::from_secs_f64((scan.time - start).max(0.0));
            tokio::select! {
                () = cancel.cancelled() => break,
                () = tokio::time::sleep_until(due.into()) => {}
            }
            let (sensor, seq) = (scan.sensor, scan.tag);
            // Counted like a batch that arrived over ingest (`handle_batch` counts there).
            state2
                .metrics()
                .batches_received
                .get_or_create(&crate::metrics::sensor(state2.label(Some(sensor))))
                .inc();
            if let Err(r) = state2.submit(scan, Instant::now()).await {
                state2.count_rejection(&r);
                tracing::warn!(sensor, seq, code = %r.code, message = %r.message, "demo scan refused");
            }
        }
        tracing::info!("demo feeder stopped");
    });
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn demo_scenario_is_valid_and_scans_in_time_order() {
        let site = Site::demo(|_| None).unwrap();
        let s = scenario(&site, 1.7e9).unwrap();
        let scans: Vec<_> = Simulator::new(&s).unwrap().take(200).collect();
        assert!(scans.windows(2).all(|w| w[0].scan.time <= w[1].scan.time));
        // Both sensors scan, with per-sensor seq starting at 1 (the simulator's convention).
        for sensor in 0..2 {
            let seqs: Vec<u64> = scans
                .iter()
                .filter(|x| x.scan.sensor == sensor)
                .map(|x| x.scan.tag)
                .collect();
            assert_eq!(seqs[0], 1);
            assert!(seqs.windows(2).all(|w| w[1] == w[0] + 1));
        }
    }
}
