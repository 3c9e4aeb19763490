//! The `gaugewise` command line: the offline bench over recorded histories.
//!
//! `fit` ranks candidate models for one tag's history and can print the winner as config; `replay` runs a config
//! over a history through the same per-sample path the daemon uses. All the work is in the library (`estimate`,
//! `report`, `replay`); this file parses arguments, reads files and maps failures to exit codes: 2 for bad input
//! of any kind (files, columns, values, config, options), 1 for anything else (e.g. output that cannot be written).
//! Every error is one line on stderr, naming the file, row, column or key as the library's errors do.

use anyhow::{anyhow, Context};
use clap::{Parser, Subcommand, ValueEnum};
use gaugewise::config::Config;
use gaugewise::estimate::{self, Data};
use gaugewise::history::{self, Series, TimeBase};
use gaugewise::replay::{self, Replay};
use gaugewise::report;
use gaugewise::runtime;
use std::io::{self, Write};
use std::path::{Path, PathBuf};
use std::process::ExitCode;

mod logformat;
use logformat::LogFormat;

/// The demo history `fit` uses without `--input`, built in so a fresh checkout works with no files at hand.
const EXAMPLE_CSV: &str = include_str!("../config/examples/vessel_temperature.csv");
const EXAMPLE_NAME: &str = "bundled example vessel_temperature.csv";

#[derive(Debug, Parser)]
#[command(
    name = "gaugewise",
    version,
    about = "Kalman-filtered sensor signals: fit models to tag histories and replay them"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Show the daemon at work: an embedded broker, a simulated plant and a live table. Needs nothing installed.
    #[command(
        long_about = "Show the daemon at work with nothing installed and nothing configured: starts an embedded \
        MQTT broker on a free loopback port, a simulated plant (the fictional Brackenfield Works: a vessel \
        temperature, a feed flow and a tank level, with dropouts and a transmitter that falls silent for ten \
        seconds every minute), and the daemon against that broker, then shows a live table per channel: raw \
        value, estimate ± std and status. Runs until Ctrl-C, or for --seconds.\n\n\
        The plant also has faults (spike bursts on TT-101, FT-201 stuck for a while), so flags show within the \
        first minute; each row has the channel's flags and a sparkline of its estimate, and a footer gives the \
        rates. When stdout is not a terminal, the views are printed one after the other and flag changes as \
        lines. At the end the session is written as an HTML report (--report, default a new file in the \
        temporary directory) and its path printed."
    )]
    Demo(DemoArgs),
    /// Fit candidate models to one tag's history and rank them.
    #[command(
        long_about = "Fit candidate models to one tag's history by maximum likelihood and rank them by \
        AIC on a common sample.\n\nWithout --input the bundled example history (config/examples/\
        vessel_temperature.csv, a vessel temperature TT-101) is used, so `gaugewise fit` works out of the box.\n\n\
        The CSV has a header row; empty cells, NaN, null and NA are missing values; times are epoch seconds, \
        epoch milliseconds or RFC 3339."
    )]
    Fit(FitArgs),
    /// Run a config over a history through the streaming filter, one output row per sample.
    #[command(
        long_about = "Run a config over a history through the streaming filter, exactly as the daemon \
        would process the samples: every value column (or every channel of a long time,channel,value file) is a \
        channel, given the model its name matches in the config, and samples are fed in time order.\n\n\
        Output CSV columns: time,channel,raw,estimate,std,innovation,std_innovation,status,flags. `time` is in seconds \
        (epoch seconds whatever the input's form, or the sample index without a time column). Empty cells mean no \
        value; std is `inf` while a diffuse model is still initialising. A summary goes to stderr.\n\n\
        With --report FILE.html it also writes a self-contained HTML report: per channel the raw values, the \
        estimate with its 95% band and the flags shaded by kind, and a table of the flags."
    )]
    Replay(ReplayArgs),
    /// Run the daemon: subscribe to the configured MQTT inputs and publish one filtered output per sample.
    #[command(
        long_about = "Run the daemon: connect to the configured MQTT broker, subscribe to the inputs, filter \
        every sample through its channel's model (the same code path as replay) and publish one JSON output per \
        sample, plus stale forecasts for channels that have gone quiet.\n\n\
        Runs until SIGTERM or SIGINT (Ctrl-C), then stops taking messages, flushes what is in flight, publishes the \
        retained offline status and exits 0. Configuration errors exit 2 before connecting. SIGHUP reloads the \
        configuration: channel models and flag designs are applied at once (changed channels restart, the others \
        keep their state), an invalid file is refused and the daemon carries on. Under systemd (Type=notify) it \
        reports readiness, reloads and shutdown, and pings the watchdog. With a [metrics] table it serves \
        Prometheus metrics on /metrics and a health check on /health. Logs go to stderr, or to the systemd \
        journal when stderr is connected to it (--log-format auto; text, json and journald force one); set \
        GAUGEWISE_LOG or RUST_LOG (e.g. debug, or gaugewise=debug) to change the level, default info."
    )]
    Run(RunArgs),
    /// Load and validate a daemon configuration and print what it resolves to.
    #[command(
        long_about = "Load and validate a daemon configuration (with GAUGEWISE_* environment overrides applied) \
        and print what it resolves to: the broker connection (never the password), the inputs, the output and \
        status topics, timing, limits and the channel models in the order they are tried.\n\n\
        Unlike replay, check needs the daemon's sections ([broker], at least one [[inputs]], [output]) and reads \
        the files they name (password_file, TLS). Exits 0 if the configuration is usable; otherwise prints one \
        line naming the file, the key and what is wrong, and exits 2."
    )]
    Check(CheckArgs),
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
enum Format {
    Table,
    Json,
}

#[derive(Debug, clap::Args)]
struct FitArgs {
    /// History CSV (wide or long format); default: the bundled example.
    #[arg(long, value_name = "FILE.csv")]
    input: Option<PathBuf>,
    /// Value column (or channel of a long file) to fit; needed when there are several.
    #[arg(long, value_name = "NAME")]
    column: Option<String>,
    /// Time column; default: the one named time, timestamp or t (any case), else the row index.
    #[arg(long, value_name = "NAME")]
    time_column: Option<String>,
    /// Candidate models, comma-separated: level, lag, trend, arma(p,q) with p and q in 0..=3.
    #[arg(long, value_name = "LIST", default_value = "level,lag,trend,arma(1,1)")]
    models: String,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    format: Format,
    /// Also print the best model as a [[channels.override]] block to paste into a config.
    #[arg(long)]
    emit_config: bool,
    /// Also write a self-contained HTML report (plots, comparison table, configuration) to this file.
    #[arg(long, value_name = "FILE.html")]
    report: Option<PathBuf>,
}

#[derive(Debug, clap::Args)]
struct ReplayArgs {
    /// Channel configuration (TOML), e.g. config/plant.toml.
    #[arg(long, value_name = "FILE.toml")]
    config: PathBuf,
    /// History CSV (wide or long format).
    #[arg(long, value_name = "FILE.csv")]
    input: PathBuf,
    /// Output CSV; default: stdout.
    #[arg(long, value_name = "FILE.csv")]
    output: Option<PathBuf>,
    /// Also write a self-contained HTML report (per channel raw, estimate and band, flags; a flag summary).
    #[arg(long, value_name = "FILE.html")]
    report: Option<PathBuf>,
}

#[derive(Debug, clap::Args)]
struct RunArgs {
    /// Configuration (TOML) with [broker], [[inputs]], [output] and the channel models.
    #[arg(long, value_name = "FILE.toml")]
    config: PathBuf,
    /// How the log is written to stderr or the journal.
    #[arg(long, value_enum, value_name = "FORMAT", default_value_t = LogFormat::Auto)]
    log_format: LogFormat,
}

#[derive(Debug, clap::Args)]
struct CheckArgs {
    /// Configuration (TOML) to check, e.g. config/brackenfield.toml.
    #[arg(long, value_name = "FILE.toml")]
    config: PathBuf,
}

/// A failure and the exit code it earns.
struct Failure {
    code: u8,
    error: anyhow::Error,
}

/// Bad input: the user can fix it by changing a file or an option.
fn input<E: Into<anyhow::Error>>(e: E) -> Failure {
    Failure {
        code: 2,
        error: e.into(),
    }
}

fn other<E: Into<anyhow::Error>>(e: E) -> Failure {
    Failure {
        code: 1,
        error: e.into(),
    }
}

fn main() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(cli) => cli,
        Err(e) if !e.use_stderr() => {
            // --help and --version: print as clap means them to be.
            let _ = e.print();
            return ExitCode::SUCCESS;
        }
        Err(e) => {
            eprintln!("error: {} (see gaugewise --help)", usage_error(&e));
            return ExitCode::from(2);
        }
    };
    let result = match cli.command {
        Command::Fit(args) => fit(&args),
        Command::Replay(args) => replay(&args),
        Command::Run(args) => run(&args),
        Command::Demo(args) => demo(&args),
        Command::Check(args) => check(&args),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(f) if is_broken_pipe(&f.error) => {
            // The reader (e.g. `head`) has what it wanted; that is not a failure of ours.
            ExitCode::SUCCESS
        }
        Err(f) => {
            eprintln!("error: {}", one_line(&f.error));
            ExitCode::from(f.code)
        }
    }
}

/// clap's usage errors run to several lines (message, hints, usage); this keeps what says what is wrong.
fn usage_error(e: &clap::Error) -> String {
    if e.kind() == clap::error::ErrorKind::DisplayHelpOnMissingArgumentOrSubcommand {
        return "no command given: use `gaugewise demo`, `run`, `check`, `fit` or `replay`"
            .to_string();
    }
    let text = e.render().to_string();
    let mut out = String::new();
    for line in text.lines().map(str::trim) {
        if line.starts_with("Usage:") || line.starts_with("For more information") {
            break;
        }
        if line.is_empty() {
            continue;
        }
        if !out.is_empty() {
            out.push_str(if out.ends_with(':') { " " } else { "; " });
        }
        out.push_str(line.strip_prefix("error: ").unwrap_or(line));
    }
    out
}

/// The error and its causes on one line. Our library errors already print their source in their own message
/// (thiserror `{source}` or `transparent`), so a cause whose text is already there is not repeated.
fn one_line(e: &anyhow::Error) -> String {
    let mut message = String::new();
    for cause in e.chain() {
        let text = cause.to_string();
        if message.contains(&text) {
            continue;
        }
        if !message.is_empty() {
            message.push_str(": ");
        }
        message.push_str(&text);
    }
    message.replace(['\n', '\r'], " ")
}

fn is_broken_pipe(e: &anyhow::Error) -> bool {
    e.chain().any(|c| {
        c.downcast_ref::<io::Error>()
            .is_some_and(|io| io.kind() == io::ErrorKind::BrokenPipe)
            || c.downcast_ref::<csv::Error>().is_some_and(|csv| {
                matches!(csv.kind(), csv::ErrorKind::Io(io) if io.kind() == io::ErrorKind::BrokenPipe)
            })
    })
}

fn fit(args: &FitArgs) -> Result<(), Failure> {
    let kinds = report::parse_model_list(&args.models).map_err(input)?;
    let columns = args.column.clone().map(|c| vec![c]);
    let (series, source) = match &args.input {
        Some(path) => (
            history::read_path(path, args.time_column.as_deref(), columns.as_deref())
                .map_err(input)?
                .0,
            path.display().to_string(),
        ),
        None => (
            history::read_any(
                EXAMPLE_CSV.as_bytes(),
                EXAMPLE_NAME,
                args.time_column.as_deref(),
                columns.as_deref(),
            )
            .map_err(input)?
            .0,
            EXAMPLE_NAME.to_string(),
        ),
    };
    let series = report::single_series(series, &source).map_err(input)?;
    let interval = report::interval_of(&series)
        .map_err(|e| input(anyhow!(e).context(describe(&source, &series))))?;
    let data = Data {
        times: &series.times,
        values: &series.values,
        interval,
    };
    let cmp = estimate::compare(&data, &kinds)
        .map_err(|e| input(anyhow!(e).context(describe(&source, &series))))?;

    let config = args.emit_config.then(|| {
        cmp.best()
            .and_then(|b| b.spec.as_ref())
            .map(|spec| report::emit_config(spec, &series.name))
    });
    let stdout = io::stdout();
    let mut out = io::BufWriter::new(stdout.lock());
    match args.format {
        Format::Json => {
            let doc = report::to_json(&cmp, interval, &series.values, config.clone());
            serde_json::to_writer(&mut out, &doc).map_err(other)?;
            writeln!(out).map_err(other)?;
        }
        Format::Table => {
            out.write_all(report::table(&cmp, interval, &series.name, &series.values).as_bytes())
                .map_err(other)?;
            if let Some(Some(block)) = &config {
                writeln!(out).map_err(other)?;
                out.write_all(block.as_bytes()).map_err(other)?;
            }
        }
    }
    out.flush().map_err(other)?;
    if let Some(path) = &args.report {
        let html =
            gaugewise::html_report::fit_report(&series, &cmp, interval, &source).map_err(other)?;
        std::fs::write(path, html)
            .with_context(|| format!("cannot write the report {}", path.display()))
            .map_err(other)?;
    }
    if config == Some(None) {
        return Err(other(anyhow!(
            "no candidate model converged for '{}', so there is no config to emit",
            series.name
        )));
    }
    Ok(())
}

/// Which series of which file an estimation error is about.
fn describe(source: &str, series: &Series) -> String {
    format!("{source}, column '{}'", series.name)
}

fn replay(args: &ReplayArgs) -> Result<(), Failure> {
    let config = Config::load(&args.config).map_err(input)?;
    let (series, base) = history::read_path(&args.input, None, None).map_err(input)?;
    let run = Replay::new(&config.channels, &series).map_err(|e| {
        input(anyhow!(e).context(format!(
            "{} with {}",
            args.config.display(),
            args.input.display()
        )))
    })?;
    let mut traces = args.report.as_ref().map(|_| replay::Traces::new(&run));
    let observe = |row: &replay::Row| {
        if let Some(t) = traces.as_mut() {
            t.push(row);
        }
    };
    let summary = match &args.output {
        Some(path) => {
            let file = std::fs::File::create(path)
                .with_context(|| format!("cannot create {}", path.display()))
                .map_err(other)?;
            write_rows(run, io::BufWriter::new(file), path, observe)?
        }
        None => write_rows(
            run,
            io::BufWriter::new(io::stdout().lock()),
            Path::new("stdout"),
            observe,
        )?,
    };
    if let (Some(path), Some(traces)) = (&args.report, traces) {
        let title = format!(
            "gaugewise replay of {} with {}",
            args.input.display(),
            args.config.display()
        );
        let html = gaugewise::html_report::replay_report(&traces.finish(), &title);
        std::fs::write(path, html)
            .with_context(|| format!("cannot write the report {}", path.display()))
            .map_err(other)?;
    }
    let index_note = if base == TimeBase::Index {
        " (no time column: times are the row index)"
    } else {
        ""
    };
    eprintln!("{summary}{index_note}");
    Ok(())
}

fn write_rows<W: Write>(
    run: Replay,
    out: W,
    path: &Path,
    observe: impl FnMut(&replay::Row),
) -> Result<replay::Summary, Failure> {
    replay::write_csv_observed(run, out, observe)
        .with_context(|| format!("cannot write {}", path.display()))
        .map_err(other)
}

fn check(args: &CheckArgs) -> Result<(), Failure> {
    let daemon = Config::load(&args.config)
        .and_then(|c| c.daemon())
        .map_err(input)?;
    let mut out = io::stdout().lock();
    out.write_all(daemon.describe().as_bytes())
        .and_then(|()| out.flush())
        .map_err(other)
}

fn run(args: &RunArgs) -> Result<(), Failure> {
    // Everything that can be wrong with the configuration is found here, before any connection is made.
    let config = Config::load(&args.config).map_err(input)?;
    let daemon = config.daemon().map_err(input)?;
    let (settings, pipeline) =
        runtime::from_config(&daemon, runtime::wall_clock()).map_err(input)?;
    runtime::mqtt_options(&settings).map_err(input)?;
    init_logging(args.log_format);
    tracing::info!(
        config = %args.config.display(),
        overrides = ?daemon.env_overrides,
        "gaugewise {} starting",
        env!("CARGO_PKG_VERSION")
    );
    let rt = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .thread_name("gaugewise")
        .build()
        .context("cannot start the async runtime")
        .map_err(other)?;
    let result = rt.block_on(async {
        // Installed before anything connects, so an early SIGTERM is a clean stop too, and an early SIGHUP a
        // reload rather than the end of the process.
        let stop = runtime::termination_signal();
        let hangups = runtime::reload::hangup_requests();
        let path = args.config.clone();
        let load: runtime::reload::Loader =
            std::sync::Arc::new(move || Config::load(&path).and_then(|c| c.daemon()));
        let channels = std::sync::Arc::new(daemon.channels.clone());
        let service = runtime::Service {
            metrics: daemon.metrics.map(|m| m.listen),
            reload: Some(runtime::reload::Reload {
                current: daemon,
                load,
                requests: hangups,
            }),
            ..runtime::Service::from_env()
        };
        runtime::run_service(settings, channels, pipeline, service, stop).await
    });
    // Tasks still running (a worker that missed the drain deadline) must not hold the exit.
    rt.shutdown_timeout(std::time::Duration::from_millis(500));
    match result {
        // A taken metrics port may be free after a restart (an old instance still stopping): not exit code 2.
        Err(e @ runtime::RuntimeError::MetricsListen { .. }) => Err(other(e)),
        Err(e) => Err(input(e)),
        Ok(_) => Ok(()),
    }
}

#[derive(Debug, clap::Args)]
struct DemoArgs {
    /// Stop after this many seconds (default: run until Ctrl-C).
    #[arg(long, value_name = "N")]
    seconds: Option<f64>,
    /// Where to write the session's HTML report at the end (default: a new file in the temporary directory).
    #[arg(long, value_name = "FILE.html")]
    report: Option<PathBuf>,
}

fn demo(args: &DemoArgs) -> Result<(), Failure> {
    use std::io::IsTerminal;
    if let Some(s) = args.seconds {
        if !(s.is_finite() && s > 0.0) {
            return Err(input(anyhow!("--seconds must be a number > 0 (got {s})")));
        }
    }
    let report_path = args
        .report
        .clone()
        .unwrap_or_else(gaugewise::demo::default_report_path);
    // Found out now rather than after a long session: the report's directory must exist.
    let dir = match report_path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    };
    if !dir.is_dir() {
        return Err(other(anyhow!(
            "cannot write the report {}: {} is not a directory",
            report_path.display(),
            dir.display()
        )));
    }
    // The table is the demo's output; log lines would tear it, so only warnings and errors go to stderr.
    if std::env::var_os("GAUGEWISE_LOG").is_none() && std::env::var_os("RUST_LOG").is_none() {
        std::env::set_var(
            "GAUGEWISE_LOG",
            format!("warn,{}", gaugewise::broker::QUIET_LOG_DIRECTIVE),
        );
    }
    init_logging(LogFormat::Auto);
    let rt = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .thread_name("gaugewise-demo")
        .build()
        .context("cannot start the async runtime")
        .map_err(other)?;
    let seconds = args.seconds;
    let terminal = io::stdout().is_terminal();
    let result = rt.block_on(async move {
        let signal = runtime::termination_signal();
        let stop = async move {
            match seconds {
                Some(s) => {
                    tokio::select! {
                        _ = signal => {}
                        _ = tokio::time::sleep(std::time::Duration::from_secs_f64(s)) => {}
                    }
                }
                None => signal.await,
            }
        };
        let mut out = io::stdout();
        gaugewise::demo::run(stop, &mut out, std::time::Duration::from_secs(1), terminal).await
    });
    rt.shutdown_timeout(std::time::Duration::from_millis(500));
    let report = result.map_err(other)?;
    eprintln!(
        "demo stopped: {} raw samples published, {} outputs received{}",
        report.published,
        report.outputs,
        match &report.counters {
            Some(c) => format!(
                "; daemon: {} received, {} published, {} rejected, {} stale",
                c.received, c.published, c.rejected, c.stale
            ),
            None => "; the daemon did not stop within 5 s".to_string(),
        }
    );
    std::fs::write(&report_path, report.report_html())
        .with_context(|| format!("cannot write the report {}", report_path.display()))
        .map_err(other)?;
    let mut out = io::stdout().lock();
    writeln!(out, "demo report: {}", report_path.display())
        .and_then(|()| out.flush())
        .map_err(other)?;
    Ok(())
}

/// The `tracing` log, in `format` (see `logformat`): level from GAUGEWISE_LOG, else RUST_LOG, else info.
fn init_logging(format: LogFormat) {
    use tracing_subscriber::EnvFilter;
    let filter = ["GAUGEWISE_LOG", "RUST_LOG"]
        .iter()
        .find_map(|var| {
            std::env::var(var)
                .ok()
                .and_then(|v| EnvFilter::try_new(v).ok())
        })
        .unwrap_or_else(|| EnvFilter::new("info"));
    logformat::install(format, filter);
}
