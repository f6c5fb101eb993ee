//! MQTT source: nodes (or the edge routers in front of them) publish each window frame, byte
//! for byte as on TCP (docs/wire-format.md), as the payload of one MQTT message on
//! `<topic_prefix>/<node>/frames`. The gateway subscribes to `<topic_prefix>/+/frames` at QoS 1
//! with MQTT 5, checks, authenticates and validates every frame as the TCP ingest does, and
//! hands the windows to the same channel.
//!
//! A message is acknowledged (PUBACK) only once its window is in the channel, so a gateway
//! that stops or dies before takes it again from the MQTT broker (a persistent session:
//! `clean_start = false` with a session expiry). With `share_group` set, the subscription is an
//! MQTT 5 shared subscription (`$share/<group>/...`): the MQTT broker gives each message to one
//! of the gateways of the group, which shares the load. Consecutive windows of one node then
//! reach different gateways, so share a group only between gateways of the `ingest` role of
//! the broker mode (docs/scale-out.md), whose recorder restores each stream's order.

use super::tcp::IngestStats;
use crate::packet::{DecodeError, Frame, KeyRing, Limits, Packet};
use rumqttc::v5::mqttbytes::v5::{Packet as MqttPacket, Publish};
use rumqttc::v5::mqttbytes::QoS;
use rumqttc::v5::{AsyncClient, Event, MqttOptions};
use serde::{Deserialize, Serialize};
use std::future::Future;
use std::sync::atomic::Ordering::Relaxed;
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::mpsc;

/// Defaults of [`MqttConfig`].
pub mod defaults {
    /// The MQTT default port on loopback.
    pub const BROKER: &str = "127.0.0.1:1883";
    /// Topics `csgate/nodes/<node>/frames`.
    pub const TOPIC_PREFIX: &str = "csgate/nodes";
    /// Half a minute: a dead link is noticed within 45 s (1.5 keep-alives, MQTT 5 3.1.2.10).
    pub const KEEP_ALIVE_S: u64 = 30;
    /// The broker keeps our subscription and queued messages for an hour while we are away.
    pub const SESSION_EXPIRY_S: u32 = 3600;
    /// Unacknowledged messages the broker may send at once (MQTT 5 receive maximum).
    pub const RECEIVE_MAXIMUM: u16 = 256;
}

/// `[mqtt]`: the MQTT source.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct MqttConfig {
    /// Subscribe and take frames. Default false.
    pub enabled: bool,
    /// The MQTT broker, `host:port`. Default `127.0.0.1:1883`.
    pub broker: String,
    /// Topics are `<topic_prefix>/<node>/frames`. Default `csgate/nodes`.
    pub topic_prefix: String,
    /// MQTT 5 shared-subscription group; empty: a plain subscription. Default empty.
    pub share_group: String,
    /// Client id (keeps the session across restarts); empty: `csgate-<host>`. Default empty.
    pub client_id: String,
    /// Keep-alive interval, seconds. Default 30.
    pub keep_alive_s: u64,
    /// How long the MQTT broker keeps the session while the gateway is away, seconds.
    /// Default 3600.
    pub session_expiry_s: u32,
    /// Unacknowledged messages in flight to this gateway. Default 256.
    pub receive_maximum: u16,
}

impl Default for MqttConfig {
    fn default() -> Self {
        Self {
            enabled: false,
            broker: defaults::BROKER.into(),
            topic_prefix: defaults::TOPIC_PREFIX.into(),
            share_group: String::new(),
            client_id: String::new(),
            keep_alive_s: defaults::KEEP_ALIVE_S,
            session_expiry_s: defaults::SESSION_EXPIRY_S,
            receive_maximum: defaults::RECEIVE_MAXIMUM,
        }
    }
}

impl MqttConfig {
    /// The topic filter subscribed to.
    pub fn filter(&self) -> String {
        let plain = format!("{}/+/frames", self.topic_prefix);
        if self.share_group.is_empty() {
            plain
        } else {
            format!("$share/{}/{plain}", self.share_group)
        }
    }

    /// `(host, port)` of the broker.
    pub fn host_port(&self) -> Option<(String, u16)> {
        let (h, p) = self.broker.rsplit_once(':')?;
        Some((h.trim_matches(['[', ']']).to_string(), p.parse().ok()?))
    }

    /// The client id: the configured one or `csgate-<host>`.
    pub fn client_id(&self) -> String {
        if !self.client_id.is_empty() {
            return self.client_id.clone();
        }
        let host = std::fs::read_to_string("/etc/hostname")
            .map(|h| h.trim().to_string())
            .unwrap_or_default();
        format!("csgate-{}", if host.is_empty() { "gateway" } else { &host })
    }

    /// Checks what serde cannot; `Err((key, expected))`.
    pub fn check(&self) -> Result<(), (&'static str, String)> {
        if !self.enabled {
            return Ok(());
        }
        if self.host_port().is_none() {
            return Err((
                "mqtt.broker",
                format!(
                    "expected \"host:port\", e.g. \"127.0.0.1:1883\", found {:?}",
                    self.broker
                ),
            ));
        }
        let bad_level = |s: &str| s.is_empty() || s.contains(['+', '#']);
        if self.topic_prefix.split('/').any(bad_level) {
            return Err((
                "mqtt.topic_prefix",
                format!(
                    "expected topic levels without wildcards, found {:?}",
                    self.topic_prefix
                ),
            ));
        }
        if !self.share_group.is_empty() && self.share_group.contains(['/', '+', '#']) {
            return Err((
                "mqtt.share_group",
                format!(
                    "expected a name without '/', '+' or '#', found {:?}",
                    self.share_group
                ),
            ));
        }
        if self.keep_alive_s == 0 {
            return Err(("mqtt.keep_alive_s", "expected at least 1 second".into()));
        }
        if self.receive_maximum == 0 {
            return Err(("mqtt.receive_maximum", "expected at least 1".into()));
        }
        Ok(())
    }

    /// The node id named by a topic `<topic_prefix>/<node>/frames`, if it is one.
    pub fn node_of_topic(&self, topic: &str) -> Option<u32> {
        let rest = topic.strip_prefix(&self.topic_prefix)?.strip_prefix('/')?;
        let node = rest.strip_suffix("/frames")?;
        node.parse().ok()
    }
}

/// Runs the MQTT source until `shutdown` completes, sending every accepted window to `tx`.
/// Connection faults are logged and retried with doubling pauses (up to 10 s); the client
/// resubscribes after each reconnection.
pub async fn run(
    config: MqttConfig,
    limits: Limits,
    keys: KeyRing,
    tx: mpsc::Sender<Packet>,
    stats: Arc<IngestStats>,
    shutdown: impl Future<Output = ()>,
) {
    let Some((host, port)) = config.host_port() else {
        tracing::error!(broker = %config.broker, "mqtt.broker is not host:port");
        return;
    };
    let mut opts = MqttOptions::new(config.client_id(), host, port);
    opts.set_keep_alive(Duration::from_secs(config.keep_alive_s))
        .set_manual_acks(true)
        .set_clean_start(false)
        .set_session_expiry_interval(Some(config.session_expiry_s))
        .set_receive_maximum(Some(config.receive_maximum))
        // A frame is at most max_frame_len bytes; the topic and properties need a little more.
        .set_max_packet_size(Some((limits.max_frame_len + 4096) as u32));
    let (client, mut eventloop) = AsyncClient::new(opts, 64);
    let filter = config.filter();
    // The event loop must keep running while the handler waits for channel room and sends
    // acknowledgements through the client, so the two run apart.
    let (pub_tx, mut pub_rx) = mpsc::channel::<Publish>(config.receive_maximum as usize);
    let poller = {
        let client = client.clone();
        let filter = filter.clone();
        tokio::spawn(async move {
            let mut pause = Duration::from_millis(100);
            loop {
                match eventloop.poll().await {
                    Ok(Event::Incoming(MqttPacket::ConnAck(ack))) => {
                        pause = Duration::from_millis(100);
                        tracing::info!(filter = %filter, session_present = ack.session_present, "mqtt connected");
                        if !ack.session_present {
                            if let Err(e) = client.subscribe(filter.clone(), QoS::AtLeastOnce).await
                            {
                                tracing::warn!(error = %e, "mqtt subscribe failed");
                            }
                        }
                    }
                    Ok(Event::Incoming(MqttPacket::Publish(p))) => {
                        if pub_tx.send(p).await.is_err() {
                            return;
                        }
                    }
                    Ok(_) => {}
                    Err(e) => {
                        tracing::warn!(error = %e, "mqtt connection fault; reconnecting");
                        tokio::time::sleep(pause).await;
                        pause = (pause * 2).min(Duration::from_secs(10));
                    }
                }
            }
        })
    };
    tokio::pin!(shutdown);
    loop {
        let p = tokio::select! {
            _ = &mut shutdown => break,
            p = pub_rx.recv() => match p { Some(p) => p, None => break },
        };
        stats.bytes.fetch_add(p.payload.len() as u64, Relaxed);
        let topic = String::from_utf8_lossy(&p.topic).into_owned();
        if let Some(packet) = accept(&config, &limits, &keys, &topic, &p.payload, &stats) {
            tokio::select! {
                _ = &mut shutdown => break,
                sent = tx.send(packet) => if sent.is_err() { break },
            }
            stats.frames_accepted.fetch_add(1, Relaxed);
        }
        // Acknowledged once handed over (or refused for good: a bad frame never gets better).
        if let Err(e) = client.ack(&p).await {
            tracing::debug!(error = %e, "mqtt ack failed");
        }
    }
    let _ = client.disconnect().await;
    // Give the event loop a moment to send the DISCONNECT, then stop it.
    let _ = tokio::time::timeout(Duration::from_millis(500), async {
        while pub_rx.recv().await.is_some() {}
    })
    .await;
    poller.abort();
}

fn accept(
    config: &MqttConfig,
    limits: &Limits,
    keys: &KeyRing,
    topic: &str,
    payload: &[u8],
    stats: &IngestStats,
) -> Option<Packet> {
    let Some(topic_node) = config.node_of_topic(topic) else {
        stats.decode_errors.fetch_add(1, Relaxed);
        tracing::warn!(topic, "mqtt message on a topic that names no node; dropped");
        return None;
    };
    if payload.len() > limits.max_frame_len {
        stats.decode_errors.fetch_add(1, Relaxed);
        tracing::warn!(topic, len = payload.len(), "mqtt frame too long; dropped");
        return None;
    }
    if let Err(e) = keys.check(payload) {
        stats.auth_failures.fetch_add(1, Relaxed);
        tracing::warn!(topic, error = %e, "mqtt frame failed authentication; dropped");
        return None;
    }
    let packet = match crate::packet::wire::parse(payload, limits) {
        Ok(Frame::Window(p)) => p,
        Ok(_) => {
            stats.decode_errors.fetch_add(1, Relaxed);
            tracing::warn!(topic, "mqtt message is not a window frame; dropped");
            return None;
        }
        Err(DecodeError::Wire(e)) => {
            stats.decode_errors.fetch_add(1, Relaxed);
            tracing::warn!(topic, error = %e, "mqtt frame malformed; dropped");
            return None;
        }
        Err(DecodeError::Invalid(e)) => {
            stats.validation_errors.fetch_add(1, Relaxed);
            tracing::warn!(topic, error = %e, "mqtt window invalid; dropped");
            return None;
        }
    };
    if packet.header.stream.node != topic_node {
        stats.validation_errors.fetch_add(1, Relaxed);
        tracing::warn!(
            topic,
            node = packet.header.stream.node,
            "mqtt frame of another node than its topic; dropped"
        );
        return None;
    }
    Some(packet)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn topics_and_filters() {
        let mut c = MqttConfig::default();
        assert_eq!(c.filter(), "csgate/nodes/+/frames");
        assert_eq!(c.node_of_topic("csgate/nodes/101/frames"), Some(101));
        assert_eq!(c.node_of_topic("csgate/nodes/x/frames"), None);
        assert_eq!(c.node_of_topic("other/101/frames"), None);
        c.share_group = "gw".into();
        assert_eq!(c.filter(), "$share/gw/csgate/nodes/+/frames");
        c.enabled = true;
        c.topic_prefix = "a/+/b".into();
        assert!(c.check().is_err());
        assert_eq!(
            MqttConfig::default().host_port(),
            Some(("127.0.0.1".into(), 1883))
        );
    }
}
