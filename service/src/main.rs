//! The `plotweave` command line: `demo`, `serve`, `batch`, `check`, `replay`, `simulate`,
//! `score`.
//!
//! Thin by design: parse arguments, load the site, build, run, and map errors to exit codes
//! (0 success, 2 configuration problems, 1 anything else). The work is in the `plotweave`
//! library.

use std::io::Write as _;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::Context as _;
use clap::{Parser, Subcommand, ValueEnum};
use plotweave::config::Site;
use plotweave::error::Error;
use plotweave::server::{self, AppState};

#[derive(Parser)]
#[command(
    name = "plotweave",
    version,
    about = "Detection batches in, track frames out."
)]
struct Cli {
    /// Log line format on standard error (`RUST_LOG` sets the level; default info).
    #[arg(long, value_enum, default_value_t = LogFormat::Text, global = true)]
    log_format: LogFormat,
    #[command(subcommand)]
    command: Command,
}

#[derive(Clone, Copy, ValueEnum)]
enum LogFormat {
    Text,
    Json,
}

#[derive(Subcommand)]
enum Command {
    /// Serve the embedded demo site, fed live by the built-in simulator.
    Demo {
        /// HOST:PORT to listen on.
        #[arg(long, default_value = plotweave::config::DEFAULT_LISTEN)]
        listen: SocketAddr,
        /// Allow listening on a non-loopback address although nothing needs a token.
        #[arg(long)]
        allow_open: bool,
    },
    /// Serve a configured site.
    Serve {
        /// Site configuration (TOML).
        #[arg(long)]
        config: PathBuf,
        /// HOST:PORT to listen on (default: server.listen of the config).
        #[arg(long)]
        listen: Option<SocketAddr>,
        /// Allow listening on a non-loopback address while some part needs no token.
        #[arg(long)]
        allow_open: bool,
    },
    /// Turn a recording (JSON Lines of detection batches) into track frames.
    Batch {
        /// Site configuration (TOML).
        #[arg(long)]
        config: PathBuf,
        /// The recording.
        #[arg(long)]
        input: PathBuf,
        /// Where frames go, one per line; `-` is standard output.
        #[arg(long)]
        output: PathBuf,
    },
    /// Validate a site configuration: print every problem (exit 2) or a summary (exit 0).
    Check {
        /// Site configuration (TOML).
        #[arg(long)]
        config: PathBuf,
    },
    /// Send a recording to a live service's ingest endpoint (e.g. staging), keeping its order.
    Replay {
        /// The recording (JSON Lines of detection batches).
        input: PathBuf,
        /// Ingest URL of the service, ws://HOST:PORT/v1/ingest.
        #[arg(long)]
        to: String,
        /// A sensor's ingest token, SENSOR=TOKEN (repeatable); otherwise PLOTWEAVE_TOKEN_<ID>.
        #[arg(long = "token", value_name = "SENSOR=TOKEN")]
        tokens: Vec<String>,
        /// Pace: recorded spacing divided by this factor, or `max` (as fast as acks allow).
        #[arg(long, default_value = "1")]
        speed: plotweave::replay::Speed,
        /// Re-stamp batch times so that the first selected batch is now.
        #[arg(long)]
        shift_to_now: bool,
        /// Only this sensor's batches (repeatable).
        #[arg(long = "sensor", value_name = "ID")]
        sensors: Vec<String>,
        /// Only batches with time >= this (UNIX seconds).
        #[arg(long)]
        from: Option<f64>,
        /// Only batches with time < this (UNIX seconds).
        #[arg(long)]
        until: Option<f64>,
    },
    /// Simulate a scenario (TOML) into a recording and its truth.
    Simulate {
        /// Scenario file (TOML; see docs/operations.md).
        #[arg(long)]
        scenario: PathBuf,
        /// Where the recording goes (JSON Lines of detection batches).
        #[arg(long)]
        output: PathBuf,
        /// Where the truth goes (one JSON line per scan).
        #[arg(long)]
        truth: PathBuf,
    },
    /// Score track frames against a simulation's truth (GOSPA, id switches, track breaks).
    Score {
        /// Truth file written by `simulate`.
        #[arg(long)]
        truth: PathBuf,
        /// Frames written by `batch` from that simulation's recording.
        #[arg(long)]
        frames: PathBuf,
        /// Print the score as JSON (with every frame) instead of a table.
        #[arg(long)]
        json: bool,
        /// Draw tracks against truth and GOSPA over time into this SVG file.
        #[arg(long)]
        plot: Option<PathBuf>,
        /// GOSPA cut-off c, metres.
        #[arg(long, default_value_t = plotweave::score::DEFAULT_CUTOFF)]
        cutoff: f64,
    },
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    plotweave::init_logging(matches!(cli.log_format, LogFormat::Json));
    match run(cli.command) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            let config = e
                .downcast_ref::<Error>()
                .is_some_and(|e| matches!(e, Error::Config { .. }));
            eprintln!("error: {e:#}");
            if config {
                ExitCode::from(2)
            } else {
                ExitCode::FAILURE
            }
        }
    }
}

fn run(command: Command) -> anyhow::Result<()> {
    match command {
        Command::Check { config } => {
            let site = Site::load(&config)?;
            print!("{}", plotweave::config::summary(&site));
            Ok(())
        }
        Command::Batch {
            config,
            input,
            output,
        } => batch(&config, &input, &output),
        Command::Serve {
            config,
            listen,
            allow_open,
        } => {
            let mut site = Site::load(&config)?;
            if let Some(l) = listen {
                site.server.listen = l;
            }
            serve(site, allow_open, false)
        }
        Command::Replay {
            input,
            to,
            tokens,
            speed,
            shift_to_now,
            sensors,
            from,
            until,
        } => {
            let mut map = std::collections::BTreeMap::new();
            for t in tokens {
                let (id, token) = t.split_once('=').ok_or_else(|| {
                    anyhow::anyhow!("--token must be SENSOR=TOKEN, got one without '='")
                })?;
                map.insert(id.to_string(), token.to_string());
            }
            let opts = plotweave::replay::ReplayOptions {
                input,
                to,
                tokens: map,
                speed,
                shift_to_now,
                sensors,
                from,
                until,
                progress: std::io::IsTerminal::is_terminal(&std::io::stderr()),
            };
            replay(&opts)
        }
        Command::Simulate {
            scenario,
            output,
            truth,
        } => simulate(&scenario, &output, &truth),
        Command::Score {
            truth,
            frames,
            json,
            plot,
            cutoff,
        } => {
            let (s, paths) = plotweave::score::score(&truth, &frames, cutoff)?;
            if json {
                println!("{}", serde_json::to_string_pretty(&s)?);
            } else {
                print!("{}", plotweave::score::table(&s));
            }
            if let Some(p) = plot {
                plotweave::score::plot(&p, &s, &paths)?;
            }
            Ok(())
        }
        Command::Demo { listen, allow_open } => {
            let mut site = Site::demo(|k| std::env::var(k).ok())?;
            site.server.listen = listen;
            serve(site, allow_open, true)
        }
    }
}

fn batch(config: &Path, input: &Path, output: &Path) -> anyhow::Result<()> {
    let site = Site::load(config)?;
    let file = std::fs::File::open(input)
        .with_context(|| format!("cannot open the recording {}", input.display()))?;
    let reader = std::io::BufReader::with_capacity(1 << 16, file);
    let stderr = std::io::stderr();
    let mut report = stderr.lock();
    let summary = if output == Path::new("-") {
        let stdout = std::io::stdout();
        let mut out = std::io::BufWriter::with_capacity(1 << 16, stdout.lock());
        plotweave::pipeline::run_batch(&site, reader, &mut out, &mut report)?
    } else {
        let file = std::fs::File::create(output)
            .with_context(|| format!("cannot create {}", output.display()))?;
        let mut out = std::io::BufWriter::with_capacity(1 << 16, file);
        plotweave::pipeline::run_batch(&site, reader, &mut out, &mut report)?
    };
    writeln!(
        report,
        "{} lines: {} batches used, {} skipped; {} frames written",
        summary.lines, summary.batches, summary.skipped, summary.frames
    )?;
    Ok(())
}

fn replay(opts: &plotweave::replay::ReplayOptions) -> anyhow::Result<()> {
    let runtime = tokio::runtime::Runtime::new().context("cannot start the async runtime")?;
    let stderr = std::io::stderr();
    let s = runtime.block_on(plotweave::replay::replay(opts, &mut stderr.lock()))?;
    println!(
        "replayed {} of {} lines to {} over {} connections in {:.2} s: {} acknowledged, {} rejected, {} re-sent after rate_limited, {} lines skipped",
        s.selected,
        s.lines,
        opts.to,
        s.connections,
        s.seconds,
        s.acked,
        s.rejected,
        s.retried,
        s.skipped
    );
    if s.rejected > 0 {
        anyhow::bail!(
            "{} of {} batches were rejected (listed above)",
            s.rejected,
            s.selected
        );
    }
    Ok(())
}

fn simulate(scenario: &Path, output: &Path, truth: &Path) -> anyhow::Result<()> {
    let text = std::fs::read_to_string(scenario)
        .with_context(|| format!("cannot read the scenario {}", scenario.display()))?;
    let file = plotweave::scenario::parse(&text, &scenario.display().to_string())?;
    let create = |p: &Path| {
        std::fs::File::create(p)
            .map(|f| std::io::BufWriter::with_capacity(1 << 16, f))
            .with_context(|| format!("cannot create {}", p.display()))
    };
    let (mut rec, mut tru) = (create(output)?, create(truth)?);
    let s = plotweave::scenario::simulate(&file, &mut rec, &mut tru)?;
    eprintln!(
        "scenario {:?}: {} scans, {} detections written to {}; truth in {}",
        file.name,
        s.scans,
        s.detections,
        output.display(),
        truth.display()
    );
    Ok(())
}

fn serve(site: Site, allow_open: bool, demo: bool) -> anyhow::Result<()> {
    server::check_exposure(&site, site.server.listen, allow_open)?;
    let runtime = tokio::runtime::Runtime::new().context("cannot start the async runtime")?;
    runtime.block_on(async move {
        let listen = site.server.listen;
        let listener = tokio::net::TcpListener::bind(listen)
            .await
            .with_context(|| format!("cannot listen on {listen}"))?;
        let addr = listener.local_addr()?;
        let state = AppState::new(site)?;
        if demo {
            plotweave::demo::spawn_feeder(&state)?;
        }
        {
            let mut out = std::io::stdout().lock();
            writeln!(out, "listening on http://{addr}")?;
            writeln!(out, "  ingest:  ws://{addr}/v1/ingest")?;
            writeln!(out, "  frames:  ws://{addr}/v1/frames")?;
            writeln!(out, "  tracks:  http://{addr}/v1/tracks")?;
            writeln!(out, "  sensors: http://{addr}/v1/sensors")?;
            writeln!(out, "  metrics: http://{addr}/metrics")?;
            out.flush()?;
        }
        server::run(listener, state, server::shutdown_signal()).await?;
        Ok(())
    })
}
