//! `csgate serve`: loads the configuration, sets up logging, runs the gateway until SIGINT or
//! SIGTERM, and exits 0 once every record is closed.

use anyhow::Context;
use clap::Args;
use csgate::daemon::{Gateway, GatewayConfig, LogFormat, Shutdown};
use std::path::PathBuf;
use std::process::ExitCode;

/// Options of `csgate serve`.
#[derive(Debug, Args)]
#[command(
    about = "Run the gateway daemon: TCP ingest, reconstruction, records, metrics and feeds",
    long_about = "Runs the gateway from one TOML configuration (every key is documented in \
configs/gateway.toml): accepts node connections, reconstructs every window on the solver \
workers, stitches each stream and writes rotating HDF5 records into the record folder, and \
serves /metrics (OpenMetrics text), /health (JSON) and /events (JSON lines, streamed) over HTTP. \
SIGINT or SIGTERM stops accepting, drains (every complete window is reconstructed, every record \
flushed and closed) and exits 0; a second signal shortens the drain by discarding the packets \
still waiting. A restart continues the record series in a new file. With [broker] roles \
(docs/scale-out.md) the process publishes frames to NATS JetStream (ingest), reconstructs the \
partitions it leases (work) and/or records what workers publish (record)."
)]
pub struct ServeArgs {
    /// The configuration file.
    #[arg(
        long,
        short,
        value_name = "FILE.toml",
        required_unless_present = "print_defaults"
    )]
    pub config: Option<PathBuf>,
    /// Print every key with its default value as TOML and exit.
    #[arg(long)]
    pub print_defaults: bool,
    /// Check the configuration (and that the record folder is writable), print a summary and
    /// exit: 0 when valid, 2 with the file, key and expected value when not.
    #[arg(long)]
    pub check: bool,
    /// Log format, overriding `log.format`: human or json.
    #[arg(long, value_name = "FORMAT", value_parser = parse_format)]
    pub log_format: Option<LogFormat>,
    /// Print the final report as one JSON object on stdout.
    #[arg(long)]
    pub json: bool,
}

fn parse_format(s: &str) -> Result<LogFormat, String> {
    match s {
        "human" => Ok(LogFormat::Human),
        "json" => Ok(LogFormat::Json),
        _ => Err(format!("expected human or json, found {s:?}")),
    }
}

/// Runs the daemon.
pub fn run(args: ServeArgs) -> anyhow::Result<ExitCode> {
    if args.print_defaults {
        print!("{}", toml::to_string(&GatewayConfig::default())?);
        return Ok(ExitCode::SUCCESS);
    }
    let path = args.config.expect("clap requires --config");
    let config = GatewayConfig::load(&path)?;
    if args.check {
        let roles = if config.broker.enabled() {
            format!(
                "broker roles {:?} on {}, ",
                config.broker.roles, config.broker.url
            )
        } else {
            String::new()
        };
        println!(
            "{}: valid. {roles}nodes on {}, http {}, {} enrolled node(s), {} worker(s), records in {}",
            path.display(),
            config.ingest.listen,
            if config.http.enabled {
                config.http.listen.to_string()
            } else {
                "off".into()
            },
            config.nodes.len(),
            config.pipeline.workers,
            config.record.folder.display()
        );
        return Ok(ExitCode::SUCCESS);
    }
    init_logging(
        args.log_format.unwrap_or(config.log.format),
        &config.log.filter,
    );
    let digest = super::config_digest(&config);
    let runtime = tokio::runtime::Builder::new_multi_thread()
        // Sockets and HTTP only: the numerics have their own pool.
        .worker_threads(2)
        .enable_all()
        .build()
        .context("cannot start the async runtime")?;
    let report = runtime.block_on(async move {
        let gateway = Gateway::bind(config, digest).await?;
        let shutdown = Shutdown::new();
        let signals = tokio::spawn(forward_signals(shutdown.clone()));
        let report = gateway.run(shutdown).await;
        signals.abort();
        report
    })?;
    if args.json {
        println!("{}", serde_json::to_string(&report)?);
    }
    Ok(ExitCode::SUCCESS)
}

/// SIGINT and SIGTERM both throw the shutdown switch (twice: shorten the drain).
async fn forward_signals(shutdown: Shutdown) {
    use tokio::signal::unix::{signal, SignalKind};
    let (Ok(mut term), Ok(mut int)) = (
        signal(SignalKind::terminate()),
        signal(SignalKind::interrupt()),
    ) else {
        tracing::error!("cannot install signal handlers; stop with SIGKILL only");
        return;
    };
    loop {
        let name = tokio::select! {
            _ = term.recv() => "SIGTERM",
            _ = int.recv() => "SIGINT",
        };
        tracing::info!(signal = name, "signal received");
        shutdown.signal();
    }
}

fn init_logging(format: LogFormat, filter: &str) {
    use tracing_subscriber::EnvFilter;
    let filter = EnvFilter::try_from_env("CSGATE_LOG").unwrap_or_else(|_| EnvFilter::new(filter));
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    let _ = match format {
        LogFormat::Human => builder.try_init(),
        LogFormat::Json => builder.json().try_init(),
    };
}
