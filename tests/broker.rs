//! Broker mode end to end with a real NATS server (JetStream) and a real MQTT broker on
//! loopback: an ingest-and-record gateway in this process, worker gateways as child
//! processes, simulated nodes over TCP and over MQTT.
//!
//! The outside reference is the fault-injecting sender's own account of which windows went
//! out intact (and which it dropped on purpose); the records are read back from HDF5. The
//! servers are Debian's `nats-server` and `mosquitto`, which `make test` installs
//! (scripts/setup.sh); when a binary is missing the test says so and returns.

use crate::util::{csgate_bin, test_dir};
use csgate::broker::server::{find_binary, free_port, LocalServer};
use csgate::broker::{BrokerConfig, Role};
use csgate::daemon::{Gateway, GatewayConfig, Shutdown};
use csgate::packet::StreamId;
use csgate::sim::run::send_to_target;
use csgate::sim::{Scenario, Simulation};
use csgate::sources::{FaultPlan, Pace, WindowKey};
use csgate::store::{RecordIndex, RecordReader, StreamKey};
use futures::StreamExt;
use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

/// `nodes` simulated nodes, one vibration channel each, n = 512 with hop 256 (fast solves),
/// machines taken in turn from the demo scenario.
fn scenario(nodes: usize) -> Scenario {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("configs/demo-site.toml");
    let mut s = Scenario::load(&path).expect("demo scenario loads");
    let base = s.nodes.clone();
    s.nodes = (0..nodes)
        .map(|i| {
            let mut n = base[i % base.len()].clone();
            n.id = 201 + i as u32;
            n.name = format!("test node {}", n.id);
            n.channels.truncate(1);
            n.window_len = 512;
            n.hop_len = Some(256);
            n.auth_key = None;
            n
        })
        .collect();
    s
}

fn nats() -> Option<(LocalServer, tempfile::TempDir)> {
    let Some(bin) = find_binary() else {
        eprintln!("SKIPPED: nats-server not found (make test installs it: scripts/setup.sh)");
        return None;
    };
    let dir = test_dir();
    let server = LocalServer::start(&bin, &dir.path().join("js")).expect("nats-server starts");
    Some((server, dir))
}

fn broker_config(url: &str, roles: Vec<Role>) -> BrokerConfig {
    BrokerConfig {
        roles,
        url: url.to_string(),
        partitions: 12,
        lease_ttl_ms: 1500,
        ..BrokerConfig::default()
    }
}

/// Starts a worker gateway (`csgate serve`, role `work`) as a child process.
fn spawn_worker(dir: &Path, url: &str, id: &str) -> Child {
    let folder = dir.join(id);
    std::fs::create_dir_all(&folder).unwrap();
    let config = folder.join("worker.toml");
    std::fs::write(
        &config,
        format!(
            "[site]\nname = \"test workers\"\n[http]\nenabled = false\n[pipeline]\nworkers = 1\n\
             [record]\nfolder = \"records\"\n[log]\nformat = \"json\"\n\
             [broker]\nroles = [\"work\"]\nurl = \"{url}\"\npartitions = 12\n\
             worker_id = \"{id}\"\nlease_ttl_ms = 1500\n"
        ),
    )
    .unwrap();
    let log = std::fs::File::create(folder.join("stderr.log")).unwrap();
    Command::new(csgate_bin())
        .args(["serve", "--config"])
        .arg(&config)
        .stdout(Stdio::null())
        .stderr(log)
        .spawn()
        .expect("start a worker")
}

/// Per stream, the windows rows and the samples of every record file in `folder`, files in
/// series order.
type Recorded = BTreeMap<StreamKey, (Vec<(u32, u64)>, Vec<f32>)>;

fn read_records(folder: &Path) -> Recorded {
    let index = RecordIndex::load(folder).unwrap();
    let mut out: Recorded = BTreeMap::new();
    for f in &index.files {
        assert!(f.closed.is_some(), "{} closed", f.file);
        let reader = RecordReader::open(&folder.join(&f.file)).unwrap();
        for key in reader.streams().unwrap() {
            let e = out.entry(key).or_default();
            e.0.extend(
                reader
                    .windows(key)
                    .unwrap()
                    .iter()
                    .map(|w| (w.capture_id, w.seq)),
            );
            e.1.extend(reader.samples(key).unwrap());
        }
    }
    out
}

/// Checks a record against what the sender delivered: every delivered window exactly once
/// and in order, the samples exactly the grid from the first to the last delivered window,
/// and NaN exactly where no delivered window covers the grid (windows the sender dropped on
/// purpose, nothing else). `n` and `hop` are the scenario's.
fn check_record(recorded: &Recorded, delivered: &[WindowKey], n: u64, hop: u64) {
    let mut by_stream: BTreeMap<StreamId, BTreeSet<(u32, u64)>> = BTreeMap::new();
    for k in delivered {
        by_stream
            .entry(k.stream)
            .or_default()
            .insert((k.capture_id, k.seq));
    }
    assert_eq!(recorded.len(), by_stream.len(), "every stream recorded");
    for (stream, sent) in &by_stream {
        let key = StreamKey::new(stream.node, stream.channel);
        let (rows, samples) = &recorded[&key];
        let expected: Vec<(u32, u64)> = sent.iter().copied().collect();
        assert_eq!(
            rows, &expected,
            "{stream}: windows rows = the delivered windows, once each, in order"
        );
        let first = expected[0].1;
        let last = expected.last().unwrap().1;
        let len = (last - first) * hop + n;
        assert_eq!(
            samples.len() as u64,
            len,
            "{stream}: one sample per grid instant, no duplicate, none missing"
        );
        let mut covered = vec![false; len as usize];
        for &(_, seq) in sent {
            let start = ((seq - first) * hop) as usize;
            covered[start..start + n as usize].fill(true);
        }
        for (p, (&c, v)) in covered.iter().zip(samples).enumerate() {
            assert_eq!(
                !c,
                v.is_nan(),
                "{stream}: sample {p} is NaN exactly where no delivered window covers it"
            );
        }
    }
}

/// A windows subscription's account: (arrival, worker, message id) of every window message.
type Seen = Arc<Mutex<Vec<(Instant, String, String)>>>;

async fn watch_windows(url: &str) -> Seen {
    let client = async_nats::connect(url).await.unwrap();
    let mut sub = client.subscribe("csgate.windows.>").await.unwrap();
    let seen: Seen = Arc::default();
    let s = Arc::clone(&seen);
    tokio::spawn(async move {
        let _client = client;
        while let Some(m) = sub.next().await {
            let h = m.headers.unwrap_or_default();
            let worker = h
                .get(csgate::broker::worker::WORKER_HEADER)
                .map(|v| v.to_string())
                .unwrap_or_default();
            let id = h
                .get("Nats-Msg-Id")
                .map(|v| v.to_string())
                .unwrap_or_default();
            s.lock().unwrap().push((Instant::now(), worker, id));
        }
    });
    seen
}

async fn kv_keys(js: &async_nats::jetstream::Context, bucket: &str) -> usize {
    match js.get_key_value(bucket).await {
        Ok(kv) => match kv.keys().await {
            Ok(keys) => keys.filter_map(|k| async { k.ok() }).count().await,
            Err(_) => 0,
        },
        Err(_) => 0,
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn three_workers_one_killed_every_window_recorded_once() {
    let Some((nats, _nats_dir)) = nats() else {
        return;
    };
    let url = nats.url();
    let dir = test_dir();
    let scenario = scenario(10);
    let (n, hop) = (512u64, 256u64);

    // The gateway the nodes talk to: ingest (frames to the broker) and record.
    let mut config = GatewayConfig::loopback_ephemeral(&dir.path().join("records"));
    config.broker = broker_config(&url, vec![Role::Ingest, Role::Record]);
    config.pipeline.workers = 1;
    let gateway = Gateway::bind(config, "test".into()).await.unwrap();
    let ingest = gateway.ingest_addr();
    let shutdown = Shutdown::new();
    let run = tokio::spawn(gateway.run(shutdown.clone()));

    let seen = watch_windows(&url).await;
    let mut workers: Vec<(String, Child)> = (1..=3)
        .map(|i| {
            let id = format!("w{i}");
            let child = spawn_worker(dir.path(), &url, &id);
            (id, child)
        })
        .collect();
    // Bounded by a count: three live workers holding all twelve partitions.
    let js = async_nats::jetstream::new(async_nats::connect(url.as_str()).await.unwrap());
    let mut ready = false;
    for _ in 0..300 {
        if kv_keys(&js, "csgate_workers").await == 3 && kv_keys(&js, "csgate_leases").await == 12 {
            ready = true;
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert!(ready, "three workers never held the twelve partitions");

    // Ten nodes, 0.8 s of signal each (79 windows), at a tenth of real time; 3% dropped.
    let sim = Simulation::new(&scenario, 0.8, false);
    let plan = FaultPlan {
        seed: 7,
        drop_p: 0.03,
        ..FaultPlan::default()
    };
    let sc = scenario.clone();
    let sender = tokio::spawn(async move {
        send_to_target(
            sim,
            &sc,
            ingest,
            &plan,
            Pace::RealTime { speed: 0.1 },
            |_| Ok(()),
        )
        .await
    });

    // Kill the busiest worker once a third of the windows are through (a count, not a clock).
    let total: usize = 10 * 79;
    for _ in 0..1200 {
        if seen.lock().unwrap().len() >= total / 3 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    let busiest = {
        let seen = seen.lock().unwrap();
        let mut count: BTreeMap<&str, usize> = BTreeMap::new();
        for (_, w, _) in seen.iter() {
            *count.entry(w.as_str()).or_default() += 1;
        }
        count
            .into_iter()
            .max_by_key(|(_, c)| *c)
            .map(|(w, _)| w.to_string())
            .expect("windows were published")
    };
    let victim = workers.iter().position(|(id, _)| *id == busiest).unwrap();
    let (victim_id, mut child) = workers.remove(victim);
    child.kill().unwrap(); // SIGKILL: no drain, no lease release
    let killed_at = Instant::now();
    let _ = child.wait();

    let summary = sender.await.unwrap().unwrap();
    let faults = summary.faults.unwrap();
    assert!(!faults.dropped.is_empty(), "the plan dropped some windows");
    let delivered: BTreeSet<String> = faults
        .delivered
        .iter()
        .map(|k| {
            format!(
                "{}.{}.{}.{}",
                k.stream.node, k.stream.channel, k.capture_id, k.seq
            )
        })
        .collect();

    // Wait (bounded count) until every delivered window was published and recorded: the
    // windows stream is a work queue, empty once the recorder took everything.
    let mut done = false;
    for _ in 0..1200 {
        let published: BTreeSet<String> = seen
            .lock()
            .unwrap()
            .iter()
            .map(|(_, _, id)| id.clone())
            .collect();
        let queued = match js.get_stream("CSGATE_WINDOWS").await {
            Ok(mut s) => s.info().await.map(|i| i.state.messages).unwrap_or(1),
            Err(_) => 1,
        };
        if delivered.is_subset(&published) && queued == 0 {
            done = true;
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert!(
        done,
        "not every delivered window was reconstructed and taken"
    );

    // Takeover: per stream the killed worker published, the first window another worker
    // published after the kill.
    let (takeover, streams_moved) = {
        let seen = seen.lock().unwrap();
        let stream_of = |id: &str| id.rsplitn(3, '.').nth(2).unwrap_or("").to_string();
        let victims: BTreeSet<String> = seen
            .iter()
            .filter(|(at, w, _)| *w == victim_id && *at < killed_at)
            .map(|(_, _, id)| stream_of(id))
            .collect();
        let mut worst = Duration::ZERO;
        for s in &victims {
            let first = seen
                .iter()
                .filter(|(at, w, id)| *at > killed_at && *w != victim_id && stream_of(id) == *s)
                .map(|(at, _, _)| *at - killed_at)
                .min()
                .expect("a survivor took the stream over");
            worst = worst.max(first);
        }
        (worst, victims.len())
    };
    println!(
        "takeover: {streams_moved} streams of worker {victim_id} resumed on the survivors {:.2} s \
         after SIGKILL (lease_ttl_ms = 1500)",
        takeover.as_secs_f64()
    );
    assert!(streams_moved > 0);

    // Stop the survivors (SIGTERM: drain, release) and the gateway.
    for (_, c) in &workers {
        let _ = Command::new("kill")
            .args(["-TERM", &c.id().to_string()])
            .status();
    }
    for (id, c) in &mut workers {
        let status = c.wait().unwrap();
        assert_eq!(status.code(), Some(0), "worker {id} exits 0 after SIGTERM");
    }
    shutdown.signal();
    let report = run.await.unwrap().unwrap();
    let b = report.broker.expect("broker figures");
    assert_eq!(b.frames_failed, 0);
    assert_eq!(
        report.pipeline.lost_windows,
        faults.lost().len() as u64
            - faults
                .lost()
                .iter()
                .filter(|k| {
                    faults
                        .delivered
                        .iter()
                        .filter(|d| d.stream == k.stream)
                        .all(|d| d.seq < k.seq)
                })
                .count() as u64,
        "lost = dropped windows before each stream's last delivered one"
    );

    let recorded = read_records(&dir.path().join("records"));
    check_record(&recorded, &faults.delivered, n, hop);
}

/// Starts mosquitto on a free loopback port with a configuration of its own.
fn mosquitto(dir: &Path) -> Option<(Child, u16)> {
    let bin = ["/usr/sbin/mosquitto", "/usr/bin/mosquitto"]
        .iter()
        .map(PathBuf::from)
        .find(|p| p.is_file())?;
    let port = free_port().unwrap();
    let conf = dir.join("mosquitto.conf");
    std::fs::write(
        &conf,
        format!("listener {port} 127.0.0.1\nallow_anonymous true\npersistence false\n"),
    )
    .unwrap();
    let child = Command::new(bin)
        .arg("-c")
        .arg(&conf)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .ok()?;
    for _ in 0..200 {
        if std::net::TcpStream::connect(("127.0.0.1", port)).is_ok() {
            return Some((child, port));
        }
        std::thread::sleep(Duration::from_millis(25));
    }
    None
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn nodes_publishing_over_mqtt_are_recorded() {
    use rumqttc::v5::mqttbytes::QoS;
    use rumqttc::v5::{AsyncClient, MqttOptions};
    let dir = test_dir();
    let Some((mut broker, port)) = mosquitto(dir.path()) else {
        eprintln!("SKIPPED: mosquitto not found (make test installs it: scripts/setup.sh)");
        return;
    };
    let scenario = scenario(4);
    let mut config = GatewayConfig::loopback_ephemeral(&dir.path().join("records"));
    config.pipeline.workers = 2;
    config.mqtt.enabled = true;
    config.mqtt.broker = format!("127.0.0.1:{port}");
    config.mqtt.client_id = "csgate-test-gateway".into();
    let gateway = Gateway::bind(config, "test".into()).await.unwrap();
    let gateway_http = gateway.http_addr();
    let shutdown = Shutdown::new();
    let run = tokio::spawn(gateway.run(shutdown.clone()));

    let http = gateway_http.expect("http on");
    // The simulated nodes publish at QoS 1 on their topics, through a client of their own.
    let mut opts = MqttOptions::new("test-nodes", "127.0.0.1", port);
    opts.set_max_packet_size(Some(1 << 20));
    let (client, mut eventloop) = AsyncClient::new(opts, 256);
    let poll = tokio::spawn(async move {
        loop {
            if eventloop.poll().await.is_err() {
                tokio::time::sleep(Duration::from_millis(50)).await;
            }
        }
    });
    let publish = |p: &csgate::packet::Packet| {
        let topic = format!("csgate/nodes/{}/frames", p.stream().node);
        let bytes = csgate::packet::wire::encode_window_to_vec(p, None).unwrap();
        let client = client.clone();
        async move {
            client
                .publish(topic, QoS::AtLeastOnce, false, bytes)
                .await
                .unwrap()
        }
    };
    let mut sim = Simulation::new(&scenario, 0.5, false);
    let mut windows = Vec::new();
    while let Some(w) = sim.next_window().unwrap() {
        windows.extend(w.packets);
    }
    // Messages published before the gateway's subscription exists are not kept, so the first
    // frame goes out again until the gateway has taken it (the copies are duplicates, which
    // the reorder buffer drops).
    let mut subscribed = false;
    for _ in 0..200 {
        publish(&windows[0]).await;
        if metric(http, "csgate_frames_accepted_total").await >= 1.0 {
            subscribed = true;
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert!(subscribed, "the gateway never took a frame from MQTT");
    for p in &windows[1..] {
        publish(p).await;
    }
    let sent: Vec<WindowKey> = windows
        .iter()
        .map(|p| WindowKey {
            stream: p.stream(),
            capture_id: p.header.capture_id,
            seq: p.header.seq,
        })
        .collect();
    let mut all = false;
    for _ in 0..600 {
        if metric(http, "csgate_windows_reconstructed_total").await >= sent.len() as f64 {
            all = true;
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert!(all, "not every published window was reconstructed");
    poll.abort();
    shutdown.signal();
    let report = run.await.unwrap().unwrap();
    let _ = broker.kill();
    let _ = broker.wait();
    assert_eq!(report.pipeline.windows, sent.len() as u64, "counts match");
    assert_eq!(report.pipeline.lost_windows, 0);
    let recorded = read_records(&dir.path().join("records"));
    check_record(&recorded, &sent, 512, 256);
}

/// One metric's sum over its labels, scraped from `/metrics`.
async fn metric(http: std::net::SocketAddr, name: &str) -> f64 {
    use tokio::io::{AsyncReadExt, AsyncWriteExt};
    let Ok(mut s) = tokio::net::TcpStream::connect(http).await else {
        return 0.0;
    };
    let req = format!("GET /metrics HTTP/1.1\r\nHost: {http}\r\nConnection: close\r\n\r\n");
    if s.write_all(req.as_bytes()).await.is_err() {
        return 0.0;
    }
    let mut buf = Vec::new();
    let _ = s.read_to_end(&mut buf).await;
    String::from_utf8_lossy(&buf)
        .lines()
        .filter(|l| !l.starts_with('#'))
        .filter_map(|l| l.rsplit_once(' '))
        .filter(|(series, _)| series.split('{').next() == Some(name))
        .filter_map(|(_, v)| v.parse::<f64>().ok())
        .sum()
}
