//! The `plotweave` command line: `demo`, `serve`, `batch`, `check`.
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
