//! `csgate bench --broker`: windows per second through the broker path against the direct
//! TCP path, on the same simulated frames, on this machine.
//!
//! - Direct: one standalone gateway in this process; the simulated nodes send over loopback
//!   TCP as fast as it takes them; the clock stops when the gateway has drained (every window
//!   reconstructed, stitched, analysed and recorded).
//! - Broker: a NATS server with JetStream on loopback (a child process, see
//!   [`crate::broker::server`]), an `ingest` + `record` gateway and a `work` gateway in this
//!   process; the same nodes send to the ingest; the clock stops when both work queues are
//!   empty and the recorder has drained. The worker gets the solver threads the direct
//!   gateway had; the recorder's own pool stays idle.
//!
//! Both include the HDF5 record and the features per block, so the difference is the
//! broker's: publishing, storing and delivering every frame and every reconstructed window
//! (with the window's samples, 4 bytes per grid instant) and the acknowledgements.

use super::{
    load_average_1m, machine_info, peak_rss_mib, workload_scenario, BenchError, MachineInfo,
    Workload,
};
use crate::broker::server::{find_binary, LocalServer};
use crate::broker::{BrokerConfig, Role};
use crate::daemon::{Gateway, GatewayConfig, ServeReport, Shutdown};
use crate::sim::run::send_to_target;
use crate::sim::Simulation;
use crate::sources::{FaultPlan, Pace};
use serde::Serialize;
use std::path::PathBuf;
use std::time::{Duration, Instant};

/// Options of the transport comparison.
#[derive(Debug, Clone)]
pub struct TransportOptions {
    /// The simulated channels.
    pub workload: Workload,
    /// Seconds of signal per channel.
    pub seconds: f64,
    /// Solver threads (the direct gateway's, and the broker worker's).
    pub workers: usize,
    /// The NATS server binary (default: found as [`find_binary`] does).
    pub nats_server: Option<PathBuf>,
    /// Folder for the scratch folder (default: the system's temporary folder).
    pub scratch_in: Option<PathBuf>,
}

/// One path's figures.
#[derive(Debug, Clone, Serialize)]
pub struct PathFigures {
    /// Windows recorded.
    pub windows: u64,
    /// Wall seconds from the first frame sent to the last window recorded.
    pub wall_s: f64,
    /// Windows per second of wall time.
    pub windows_per_s: f64,
}

/// What the comparison measured.
#[derive(Debug, Clone, Serialize)]
pub struct TransportReport {
    /// The machine.
    pub machine: MachineInfo,
    /// The workload.
    pub workload: Workload,
    /// Seconds of signal per channel.
    pub seconds: f64,
    /// Solver threads.
    pub workers: usize,
    /// Frames sent (each path got the same).
    pub frames: u64,
    /// The direct TCP path.
    pub tcp: PathFigures,
    /// The broker path.
    pub broker: PathFigures,
    /// Broker windows/s over TCP windows/s.
    pub ratio: f64,
    /// The machine's 1-minute load average before the runs (other work on the machine skews
    /// both figures).
    pub load_1m_before: Option<f64>,
    /// Peak resident memory of this process over both runs (the NATS server not included),
    /// MiB.
    pub peak_rss_mib: Option<f64>,
}

fn opt_err(what: &str) -> impl Fn(String) -> BenchError + '_ {
    move |e| BenchError::Option(format!("{what}: {e}"))
}

fn figures(report: &ServeReport, wall: Duration) -> PathFigures {
    let wall_s = wall.as_secs_f64().max(1e-9);
    PathFigures {
        windows: report.pipeline.windows,
        wall_s,
        windows_per_s: report.pipeline.windows as f64 / wall_s,
    }
}

fn base_config(folder: PathBuf, workers: usize) -> GatewayConfig {
    let mut c = GatewayConfig::loopback_ephemeral(&folder);
    c.pipeline.workers = workers;
    c.http.enabled = false;
    // The bench measures the drain: it must not be cut short.
    c.shutdown.drain_timeout_s = 24 * 3600;
    c
}

/// Runs both paths and reports windows per second of each.
pub fn measure_transport(opts: &TransportOptions) -> Result<TransportReport, BenchError> {
    if !(opts.seconds.is_finite() && opts.seconds > 0.0) {
        return Err(BenchError::Option(format!(
            "seconds: {} must be positive",
            opts.seconds
        )));
    }
    let scenario = workload_scenario(&opts.workload)?;
    let load_1m_before = load_average_1m();
    let nats = opts
        .nats_server
        .clone()
        .or_else(find_binary)
        .ok_or_else(|| {
            BenchError::Option(
                "nats-server not found: install Debian's nats-server (scripts/setup.sh does) or \
             give --nats-server PATH"
                    .into(),
            )
        })?;
    let base = opts.scratch_in.clone().unwrap_or_else(std::env::temp_dir);
    let scratch = tempfile::Builder::new()
        .prefix("csgate-bench-transport-")
        .tempdir_in(&base)
        .map_err(|source| BenchError::Scratch {
            path: base.clone(),
            source,
        })?;
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .map_err(|e| opt_err("async runtime")(e.to_string()))?;
    let dir = scratch.path().to_path_buf();
    let (frames, tcp, broker) = runtime.block_on(async {
        // Direct TCP.
        let config = base_config(dir.join("tcp"), opts.workers);
        let gw = Gateway::bind(config, "bench".into())
            .await
            .map_err(|e| opt_err("direct gateway")(e.to_string()))?;
        let addr = gw.ingest_addr();
        let shutdown = Shutdown::new();
        let run = tokio::spawn(gw.run(shutdown.clone()));
        let started = Instant::now();
        let sent = send_to_target(
            Simulation::new(&scenario, opts.seconds, false),
            &scenario,
            addr,
            &FaultPlan::default(),
            Pace::AsFastAsPossible,
            |_| Ok(()),
        )
        .await?;
        shutdown.signal();
        let report = run
            .await
            .map_err(|e| opt_err("direct gateway")(e.to_string()))?
            .map_err(|e| opt_err("direct gateway")(e.to_string()))?;
        let tcp = figures(&report, started.elapsed());

        // Broker: server, ingest + record, one worker.
        let server = LocalServer::start(&nats, &dir.join("js"))
            .map_err(|e| opt_err("nats-server")(e.to_string()))?;
        let broker_cfg = |roles: Vec<Role>| BrokerConfig {
            roles,
            url: server.url(),
            worker_id: "bench-worker".into(),
            ..BrokerConfig::default()
        };
        let mut edge = base_config(dir.join("edge"), 1);
        edge.broker = broker_cfg(vec![Role::Ingest, Role::Record]);
        let mut work = base_config(dir.join("work"), opts.workers);
        work.broker = broker_cfg(vec![Role::Work]);
        let partitions = work.broker.partitions as usize;
        let edge_gw = Gateway::bind(edge, "bench".into())
            .await
            .map_err(|e| opt_err("ingest and record gateway")(e.to_string()))?;
        let addr = edge_gw.ingest_addr();
        let work_gw = Gateway::bind(work, "bench".into())
            .await
            .map_err(|e| opt_err("worker gateway")(e.to_string()))?;
        let (edge_stop, work_stop) = (Shutdown::new(), Shutdown::new());
        let edge_run = tokio::spawn(edge_gw.run(edge_stop.clone()));
        let work_run = tokio::spawn(work_gw.run(work_stop.clone()));
        let client = async_nats::connect(server.url())
            .await
            .map_err(|e| opt_err("bench client")(e.to_string()))?;
        let js = async_nats::jetstream::new(client);
        // The worker holds every partition before the clock starts.
        let mut held = 0;
        for _ in 0..400 {
            held = kv_len(&js, "csgate_leases").await;
            if held == partitions {
                break;
            }
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
        if held != partitions {
            return Err(BenchError::Option(format!(
                "the worker holds {held} of {partitions} partitions after 20 s"
            )));
        }
        let started = Instant::now();
        send_to_target(
            Simulation::new(&scenario, opts.seconds, false),
            &scenario,
            addr,
            &FaultPlan::default(),
            Pace::AsFastAsPossible,
            |_| Ok(()),
        )
        .await?;
        // Every frame stored, solved and taken: both work queues empty.
        loop {
            let f = stream_state(&js, "CSGATE_FRAMES").await;
            let w = stream_state(&js, "CSGATE_WINDOWS").await;
            if f.0 >= sent.frames && f.1 == 0 && w.0 >= sent.frames && w.1 == 0 {
                break;
            }
            tokio::time::sleep(Duration::from_millis(20)).await;
        }
        edge_stop.signal();
        let report = edge_run
            .await
            .map_err(|e| opt_err("ingest and record gateway")(e.to_string()))?
            .map_err(|e| opt_err("ingest and record gateway")(e.to_string()))?;
        let broker = figures(&report, started.elapsed());
        work_stop.signal();
        let _ = work_run.await;
        drop(server);
        Ok::<_, BenchError>((sent.frames, tcp, broker))
    })?;
    Ok(TransportReport {
        machine: machine_info(),
        workload: opts.workload.clone(),
        seconds: opts.seconds,
        workers: opts.workers,
        frames,
        ratio: broker.windows_per_s / tcp.windows_per_s.max(1e-9),
        tcp,
        broker,
        load_1m_before,
        peak_rss_mib: peak_rss_mib(),
    })
}

/// (messages ever stored, messages held now) of a stream; zeros while it does not exist.
async fn stream_state(js: &async_nats::jetstream::Context, name: &str) -> (u64, u64) {
    match js.get_stream(name).await {
        Ok(mut s) => match s.info().await {
            Ok(i) => (i.state.last_sequence, i.state.messages),
            Err(_) => (0, u64::MAX),
        },
        Err(_) => (0, u64::MAX),
    }
}

async fn kv_len(js: &async_nats::jetstream::Context, bucket: &str) -> usize {
    use futures::StreamExt;
    let Ok(kv) = js.get_key_value(bucket).await else {
        return 0;
    };
    match kv.keys().await {
        Ok(keys) => keys.filter_map(|k| async { k.ok() }).count().await,
        Err(_) => 0,
    }
}
