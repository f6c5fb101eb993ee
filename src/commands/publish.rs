//! `csgate publish`: puts the windows of packet logs on a broker's frames stream, as the
//! `ingest` role does with live frames (docs/scale-out.md), for workers to reconstruct and a
//! recorder to record.

use anyhow::Context;
use clap::Args;
use csgate::broker::publish::{publish_frames, PublishStats};
use csgate::broker::Broker;
use csgate::daemon::GatewayConfig;
use csgate::sources::packet_log::replay_blocking;
use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::atomic::Ordering::Relaxed;
use std::sync::Arc;

/// Options of `csgate publish`.
#[derive(Debug, Args)]
#[command(
    about = "Publish the windows of packet logs to a broker's frames stream",
    long_about = "Reads packet logs and publishes every window that authenticates and \
validates (with the [[node]] keys and [ingest.limits] of the configuration) to the frames \
stream of the broker named in its [broker] section, exactly as a gateway with the \"ingest\" \
role does with live frames. Windows the broker already holds (same node, channel, capture and \
sequence number within broker.duplicate_window_s) are stored once. Exit code 0 when every \
window was stored, 1 when some could not be."
)]
pub struct PublishArgs {
    /// Packet logs, published one after the other.
    #[arg(required = true, value_name = "LOG")]
    pub logs: Vec<PathBuf>,
    /// Gateway configuration with the [broker] section (url, name, partitions).
    #[arg(long, short, value_name = "FILE.toml")]
    pub config: PathBuf,
    /// Print the figures as one JSON object.
    #[arg(long)]
    pub json: bool,
}

/// Runs the command.
pub fn run(args: PublishArgs) -> anyhow::Result<ExitCode> {
    let config = GatewayConfig::load(&args.config)?;
    let limits = config.ingest_config().limits;
    let keys = config.key_ring();
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .context("cannot start the async runtime")?;
    let stats = Arc::new(PublishStats::default());
    let (windows, rejected) = runtime.block_on(async {
        let broker = Broker::connect(&config.broker, "csgate publish").await?;
        let (tx, rx) = tokio::sync::mpsc::channel(1024);
        let publisher = tokio::spawn(publish_frames(broker, rx, Arc::clone(&stats)));
        let logs = args.logs.clone();
        let read = tokio::task::spawn_blocking(move || {
            let mut totals = (0u64, 0u64);
            for log in &logs {
                let s = replay_blocking(log, &limits, &keys, &tx)
                    .with_context(|| format!("reading {}", log.display()))?;
                totals.0 += s.windows;
                totals.1 += s.auth_failures + s.decode_errors + s.validation_errors;
                if s.receiver_closed {
                    break;
                }
            }
            Ok::<_, anyhow::Error>(totals)
        })
        .await
        .context("the log reader panicked")??;
        publisher.await.context("the publisher panicked")??;
        Ok::<_, anyhow::Error>(read)
    })?;
    let (published, duplicates, failed) = (
        stats.published.load(Relaxed),
        stats.duplicates.load(Relaxed),
        stats.failed.load(Relaxed),
    );
    if args.json {
        println!(
            "{}",
            serde_json::json!({
                "windows": windows, "published": published, "duplicates": duplicates,
                "failed": failed, "rejected_records": rejected,
            })
        );
    } else {
        println!(
            "windows {windows}   published {published}   already held {duplicates}   failed {failed}   rejected records {rejected}"
        );
    }
    Ok(if failed == 0 {
        ExitCode::SUCCESS
    } else {
        ExitCode::from(1)
    })
}
