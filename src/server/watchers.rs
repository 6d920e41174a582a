//! One publisher for every watch subscriber.
//!
//! A single task ticks once per [`WATCH_TICK`], builds each due session's report once per
//! round (however many subscribers it has), and offers it to each due subscriber without
//! waiting: a subscriber whose one-report channel is still full skips that report, and one that
//! leaves [`MAX_UNREAD_REPORTS`] reports in a row unread is ended, as is one that went away
//! (both counted by `mtgauge_watch_subscribers_dropped_total`).

use std::collections::HashMap;
use std::sync::Arc;
use std::time::Duration;

use tokio::sync::{mpsc, watch};
use tokio::time::Instant;
use tonic::Status;

use super::error::ServiceError;
use super::state::{Gate, State};
use crate::pb;
use crate::session::Session;
use crate::telemetry;

/// Resolution of the publisher's clock (watch intervals are whole seconds).
pub const WATCH_TICK: Duration = Duration::from_secs(1);
/// Reports in a row a subscriber may leave unread before the server ends its watch.
pub const MAX_UNREAD_REPORTS: u32 = 10;
/// How long the closing status of an ended watch waits for room in its channel.
pub const CLOSING_STATUS_WAIT: Duration = Duration::from_secs(5);

/// What a subscriber receives.
pub type Report = std::result::Result<pb::ScoresReport, Status>;

/// Handle of the publisher: cloned into every service, one task behind it.
#[derive(Clone)]
pub struct Watchers {
    join: mpsc::UnboundedSender<Subscriber>,
}

struct Subscriber {
    session: Arc<Session>,
    every: Duration,
    /// Interval level of its reports (0: the default).
    level: f64,
    due: Instant,
    tx: mpsc::Sender<Report>,
    unread: u32,
    /// Holds the subscriber's place under `limits.max_watchers` until it is dropped.
    _gate: Gate,
}

impl Watchers {
    /// Start the publisher (inside a Tokio runtime); it ends, ending every watch, when `stop`
    /// turns true. `report` builds a session's current report.
    pub fn start(state: State, stop: watch::Receiver<bool>, report: fn(&State, &Session, f64) -> pb::ScoresReport) -> Watchers {
        let (join, joined) = mpsc::unbounded_channel();
        tokio::spawn(publish(state, stop, joined, report));
        Watchers { join }
    }

    /// Subscribe to `session` every `every` (rounded up to [`WATCH_TICK`]); the first report
    /// comes at once. The receiver gets one report at a time.
    pub fn subscribe(&self, session: Arc<Session>, every: Duration, level: f64, gate: Gate) -> std::result::Result<mpsc::Receiver<Report>, ServiceError> {
        let (tx, rx) = mpsc::channel(1);
        let sub = Subscriber { session, every: every.max(WATCH_TICK), level, due: Instant::now(), tx, unread: 0, _gate: gate };
        self.join.send(sub).map_err(|_| ServiceError::ShuttingDown)?;
        Ok(rx)
    }
}

async fn publish(state: State, mut stop: watch::Receiver<bool>, mut joined: mpsc::UnboundedReceiver<Subscriber>, report: fn(&State, &Session, f64) -> pb::ScoresReport) {
    let mut subscribers: Vec<Subscriber> = Vec::new();
    let mut tick = tokio::time::interval(WATCH_TICK);
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Skip);
    loop {
        tokio::select! {
            biased;
            _ = stop.wait_for(|s| *s) => break,
            Some(s) = joined.recv() => subscribers.push(s),
            _ = tick.tick() => {}
        }
        round(&mut subscribers, &state, Instant::now(), report);
    }
}

/// Offer the current report to every subscriber that is due at `now`, and drop the ones that
/// went away, stalled, or watch a session that was closed.
fn round(subscribers: &mut Vec<Subscriber>, state: &State, now: Instant, report: fn(&State, &Session, f64) -> pb::ScoresReport) {
    let mut reports: HashMap<(String, u64), pb::ScoresReport> = HashMap::new();
    subscribers.retain_mut(|s| {
        if s.tx.is_closed() {
            telemetry::watch_subscriber_dropped("closed");
            return false;
        }
        // Half a tick of slack: rounds fire a little after their tick, never exactly on it.
        if now + WATCH_TICK / 2 < s.due {
            return true;
        }
        s.due = now + s.every;
        let name = &s.session.spec().name;
        // A closed session ends the watch.
        if !state.session(name).is_ok_and(|live| Arc::ptr_eq(&live, &s.session)) {
            closing_status(s.tx.clone(), ServiceError::UnknownSession(name.clone()).into());
            return false;
        }
        let r = reports.entry((name.clone(), s.level.to_bits())).or_insert_with(|| report(state, &s.session, s.level)).clone();
        match s.tx.try_send(Ok(r)) {
            Ok(()) => {
                s.unread = 0;
                true
            }
            Err(mpsc::error::TrySendError::Full(_)) => {
                telemetry::watch_report_skipped();
                s.unread += 1;
                if s.unread < MAX_UNREAD_REPORTS {
                    return true;
                }
                telemetry::watch_subscriber_dropped("stalled");
                tracing::info!(session = %name, unread = s.unread, "watch subscriber ended: it does not read its reports");
                let why = format!("watch ended by the server: {} reports in a row were left unread (read the stream, or watch with a longer interval)", s.unread);
                closing_status(s.tx.clone(), Status::resource_exhausted(why));
                false
            }
            Err(mpsc::error::TrySendError::Closed(_)) => {
                telemetry::watch_subscriber_dropped("closed");
                false
            }
        }
    });
}

/// Send a watch's closing status once its channel has room (bounded by
/// [`CLOSING_STATUS_WAIT`]); the stream ends when this sender goes.
fn closing_status(tx: mpsc::Sender<Report>, status: Status) {
    tokio::spawn(async move {
        let _ = tokio::time::timeout(CLOSING_STATUS_WAIT, tx.send(Err(status))).await;
    });
}
