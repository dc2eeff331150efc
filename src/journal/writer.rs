//! The writer thread: the table of recent decisions (for joining outcomes) and the journal.

use super::file::{DecisionLine, JournalFiles, Record};
use crate::live::{LabelledDecision, LiveQuality, Tracker, WindowSizes, WindowSlot, WindowSpec};
use arc_swap::ArcSwap;
use std::collections::{HashMap, VecDeque};
use std::path::PathBuf;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::mpsc::{sync_channel, Receiver, SyncSender, TryRecvError, TrySendError};
use std::sync::Arc;
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};
use tokio::sync::oneshot;

/// Records the writer takes in one batch at most.
const BATCH: usize = 4096;
/// How often an idle writer forgets expired decisions.
const IDLE: Duration = Duration::from_millis(200);
/// How long the writer sleeps when its queue is empty by default (see [`JournalOptions::poll`]).
pub const DEFAULT_POLL: Duration = Duration::from_millis(10);

/// How the decision log behaves.
#[derive(Debug, Clone)]
pub struct JournalOptions {
    /// Journal directory; `None` keeps only the table of recent decisions (outcomes still join).
    pub dir: Option<PathBuf>,
    /// A journal file is rotated once it would grow past this many bytes.
    pub max_file_bytes: u64,
    /// Journal files kept; older ones are removed.
    pub keep_files: usize,
    /// Sync each batch to disk (`fdatasync`) before acknowledging its outcomes.
    pub fsync: bool,
    /// Keep the raw logits in decision records (needed to refit from the journal).
    pub logits: bool,
    /// Records that may wait for the writer; beyond this, new ones are dropped and counted.
    pub queue: usize,
    /// Decisions remembered for joining outcomes (oldest forgotten first).
    pub remember: usize,
    /// How long a decision can be joined to its outcome.
    pub retention: Duration,
    /// Sliding windows of the live quality estimates.
    pub windows: WindowSizes,
    /// How long the writer sleeps when its queue is empty: the most a decision waits to be
    /// taken. An outcome or a refresh wakes it at once.
    pub poll: Duration,
}

impl Default for JournalOptions {
    fn default() -> Self {
        JournalOptions {
            dir: None,
            max_file_bytes: 64 * 1024 * 1024,
            keep_files: 16,
            fsync: false,
            logits: true,
            queue: 65_536,
            remember: 1_000_000,
            retention: Duration::from_secs(7 * 24 * 3600),
            windows: WindowSizes::default(),
            poll: DEFAULT_POLL,
        }
    }
}

/// Counters of the decision log.
#[derive(Debug, Default)]
pub struct JournalStats {
    /// Records written to the journal.
    pub written: AtomicU64,
    /// Records dropped: queue full, or a write that failed.
    pub dropped: AtomicU64,
    /// Journal writes that failed (full or broken disk).
    pub write_errors: AtomicU64,
    /// Outcomes joined to a decision.
    pub outcomes: AtomicU64,
    /// Times the writer found its queue empty and went to sleep.
    pub sleeps: AtomicU64,
}

/// What an accepted outcome joined.
#[derive(Debug, Clone, PartialEq)]
pub struct OutcomeAck {
    /// Model of the decision.
    pub model: String,
    /// Map version that answered.
    pub map_version: String,
    /// True when the prediction was right.
    pub correct: bool,
    /// True when this label had already been recorded (the call changed nothing).
    pub duplicate: bool,
    /// True when the outcome is in the journal (false without a journal or after a failed write).
    pub journaled: bool,
}

/// Why an outcome was refused.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum OutcomeError {
    /// No remembered decision has this id.
    #[error("no recent decision has request id {0:?} (unknown, or past the retention)")]
    Unknown(String),
    /// The id already has another label.
    #[error("request id {request_id:?} already has true label {recorded}; got {given}")]
    Conflict {
        /// The request id.
        request_id: String,
        /// Label recorded first.
        recorded: u32,
        /// Label given now.
        given: u32,
    },
    /// The request id is empty.
    #[error("request_id is empty; outcomes are joined by request id")]
    EmptyId,
    /// The label is not a class of the map that answered.
    #[error("true_label {label} is not a class of the map that answered {request_id:?} (classes 0..{classes})")]
    LabelOutOfRange {
        /// The request id.
        request_id: String,
        /// The label given.
        label: u32,
        /// Classes of the map.
        classes: u32,
    },
    /// The writer is behind; try again.
    #[error("the decision log is busy; retry")]
    Busy,
    /// The writer has stopped.
    #[error("the decision log has stopped")]
    Stopped,
}

/// Which map answered a request: built once per loaded (model, version) and shared by the
/// registry and the decision log, so handing a decision over copies no names.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct MapKey {
    /// Model.
    pub model: String,
    /// Map version.
    pub map_version: String,
    /// Number of classes of the map.
    pub classes: u32,
}

/// One answered request, as the service hands it over.
#[derive(Debug, Clone)]
pub struct Decided<'a> {
    /// The caller's id (may be empty: then it cannot be joined to an outcome).
    pub request_id: &'a str,
    /// The map that answered.
    pub map: &'a Arc<MapKey>,
    /// Predicted class.
    pub predicted: u32,
    /// Calibrated confidence.
    pub confidence: f32,
    /// Accepted or deferred.
    pub accepted: bool,
    /// In the audit sample.
    pub audit: bool,
    /// The raw logits (moved into the record when the log keeps them, else dropped; see
    /// [`DecisionLog::keeps_logits`]).
    pub logits: Vec<f32>,
    /// When the sidecar began answering (the instant its latency is measured from). The writer
    /// turns it into wall-clock time, so the request path reads no second clock.
    pub at: Instant,
}

/// A decision on its way to the writer: one owned string (the request id), a shared key, and
/// the logits only when a journal keeps them.
struct Pending {
    at: Instant,
    /// None for a request without an id (nothing to join an outcome to).
    request_id: Option<Arc<str>>,
    map: Arc<MapKey>,
    predicted: u32,
    confidence: f32,
    accepted: bool,
    audit: bool,
    logits: Option<Vec<f32>>,
}

enum Entry {
    /// An answered request.
    Decision(Pending),
    Outcome {
        request_id: String,
        label: u32,
        reply: oneshot::Sender<Result<OutcomeAck, OutcomeError>>,
    },
    /// Publish the live quality now and say when done.
    Refresh(oneshot::Sender<()>),
}

/// What the writer needs to know about a (model, map version) the first time it sees one.
pub type SpecLookup = Arc<dyn Fn(&str, &str) -> WindowSpec + Send + Sync>;

/// Handle to the decision log; cheap to clone.
#[derive(Debug, Clone)]
pub struct DecisionLog {
    /// SyncSender: bounded, and `try_send` never blocks the request path.
    tx: SyncSender<Entry>,
    /// The writer thread, woken for outcomes and refreshes (never for decisions).
    writer: std::thread::Thread,
    stats: Arc<JournalStats>,
    logits: bool,
    live: Arc<ArcSwap<Vec<LiveQuality>>>,
}

impl std::fmt::Debug for Entry {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("Entry")
    }
}

fn now_ms() -> u64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| d.as_millis() as u64)
}

impl DecisionLog {
    /// Starts the writer thread.
    ///
    /// # Errors
    /// When the journal directory cannot be created or its first file opened.
    pub fn spawn(options: JournalOptions) -> std::io::Result<Self> {
        Self::spawn_watched(options, Arc::new(|_: &str, _: &str| WindowSpec::default()))
    }

    /// Starts the writer thread; `spec` tells the live-quality windows about each map version
    /// (its fit-time reference, its promise, its audit rate).
    ///
    /// # Errors
    /// When the journal directory cannot be created or its first file opened.
    pub fn spawn_watched(options: JournalOptions, spec: SpecLookup) -> std::io::Result<Self> {
        let files = match &options.dir {
            Some(d) => Some(JournalFiles::open(
                d,
                options.max_file_bytes,
                options.keep_files,
            )?),
            None => None,
        };
        let (tx, rx) = sync_channel(options.queue.max(1));
        let stats = Arc::new(JournalStats::default());
        // Only a journal reads the logits: without one they are not copied at all.
        let logits = options.logits && options.dir.is_some();
        let live = Arc::new(ArcSwap::from_pointee(Vec::new()));
        let mut w = Writer {
            rx,
            files,
            tracker: Tracker::new(options.windows),
            last_window: None,
            clock: (now_ms(), Instant::now()),
            options,
            stats: stats.clone(),
            recent: HashMap::new(),
            order: VecDeque::new(),
            spec,
            live: live.clone(),
        };
        let writer = std::thread::Builder::new()
            .name("candor-journal".into())
            .spawn(move || w.run())?
            .thread()
            .clone();
        Ok(DecisionLog {
            tx,
            writer,
            stats,
            logits,
            live,
        })
    }

    /// The live quality of every (model, map version) as last published by the writer.
    pub fn live(&self) -> Arc<Vec<LiveQuality>> {
        self.live.load_full()
    }

    /// Asks the writer to publish the live quality now (after everything queued before this
    /// call) and returns it; when the writer is behind, the last published one.
    pub async fn live_now(&self) -> Arc<Vec<LiveQuality>> {
        let (tx, rx) = oneshot::channel();
        if self.tx.try_send(Entry::Refresh(tx)).is_ok() {
            self.writer.unpark();
            let _ = rx.await;
        }
        self.live()
    }

    /// The log's counters.
    pub fn stats(&self) -> &Arc<JournalStats> {
        &self.stats
    }

    /// True when decision records keep the raw logits (a journal directory is set and logits
    /// are not switched off): only then does [`DecisionLog::decision`] need them.
    #[inline]
    pub fn keeps_logits(&self) -> bool {
        self.logits
    }

    /// Hands one answered request to the writer; drops it (counted) when the writer is behind.
    #[inline]
    pub fn decision(&self, d: Decided<'_>) {
        let p = Pending {
            at: d.at,
            request_id: (!d.request_id.is_empty()).then(|| Arc::from(d.request_id)),
            map: d.map.clone(),
            predicted: d.predicted,
            confidence: d.confidence,
            accepted: d.accepted,
            audit: d.audit,
            logits: self.logits.then_some(d.logits),
        };
        if self.tx.try_send(Entry::Decision(p)).is_err() {
            self.stats.dropped.fetch_add(1, Ordering::Relaxed);
        }
    }

    /// Joins a true label to the decision with `request_id`; resolves once it is journaled.
    ///
    /// # Errors
    /// [`OutcomeError`] for an empty, unknown or conflicting id, or a log that is busy or gone.
    pub async fn outcome(&self, request_id: &str, label: u32) -> Result<OutcomeAck, OutcomeError> {
        if request_id.is_empty() {
            return Err(OutcomeError::EmptyId);
        }
        let (reply, rx) = oneshot::channel();
        let entry = Entry::Outcome {
            request_id: request_id.to_owned(),
            label,
            reply,
        };
        match self.tx.try_send(entry) {
            Ok(()) => {
                self.writer.unpark();
                rx.await.map_err(|_| OutcomeError::Stopped)?
            }
            Err(TrySendError::Full(_)) => Err(OutcomeError::Busy),
            Err(TrySendError::Disconnected(_)) => Err(OutcomeError::Stopped),
        }
    }
}

/// A remembered decision.
struct Recent {
    at_ms: u64,
    map: Arc<MapKey>,
    predicted: u32,
    confidence: f32,
    accepted: bool,
    audit: bool,
    label: Option<u32>,
}

struct Writer {
    rx: Receiver<Entry>,
    files: Option<JournalFiles>,
    options: JournalOptions,
    stats: Arc<JournalStats>,
    recent: HashMap<Arc<str>, Recent>,
    /// Request ids in arrival order, for forgetting the oldest.
    order: VecDeque<(u64, Arc<str>)>,
    tracker: Tracker,
    /// The live-quality window of the map that answered the latest decision: consecutive
    /// decisions of one map skip the lookup by model and version.
    last_window: Option<(Arc<MapKey>, WindowSlot)>,
    /// Wall-clock milliseconds and the monotonic instant, read together once per batch.
    clock: (u64, Instant),
    spec: SpecLookup,
    live: Arc<ArcSwap<Vec<LiveQuality>>>,
}

type Reply = (
    oneshot::Sender<Result<OutcomeAck, OutcomeError>>,
    OutcomeAck,
);

impl Writer {
    fn run(&mut self) {
        let mut buf = Vec::with_capacity(1 << 16);
        let mut last_forget = Instant::now();
        loop {
            // Polled, never parked in `recv`: a decision's sender then never has a sleeping
            // receiver to wake, so handing a decision over is a queue write with no system call
            // on the request path (waking the writer for every request cost about a fifth more
            // latency at 4 clients on 2 cores, `cargo bench --bench watch_overhead`). An outcome
            // or a refresh, which a caller waits on, unparks it. Each wake costs the core a
            // context switch both ways and a cold start: polling every 2 ms, the writer took
            // 1.5 µs of CPU a request at K = 1000 and one client, every 10 ms 0.4 µs (its
            // /proc schedstat during `cargo bench --bench sidecar_compare`).
            let first = match self.rx.try_recv() {
                Ok(e) => e,
                Err(TryRecvError::Empty) => {
                    self.stats.sleeps.fetch_add(1, Ordering::Release);
                    std::thread::park_timeout(self.options.poll);
                    if last_forget.elapsed() >= IDLE {
                        self.forget_old();
                        last_forget = Instant::now();
                    }
                    continue;
                }
                Err(TryRecvError::Disconnected) => return,
            };
            buf.clear();
            self.clock = (now_ms(), Instant::now());
            let mut lines = 0u64;
            let mut replies: Vec<Reply> = Vec::new();
            let mut next = Some(first);
            let mut taken = 0;
            while let Some(entry) = next.take() {
                self.take(entry, &mut buf, &mut lines, &mut replies);
                taken += 1;
                if taken < BATCH {
                    next = self.rx.try_recv().ok();
                }
            }
            let journaled = self.write(&buf, lines);
            for (reply, mut ack) in replies {
                ack.journaled = journaled;
                self.stats.outcomes.fetch_add(1, Ordering::Relaxed);
                let _ = reply.send(Ok(ack));
            }
            self.forget_old();
        }
    }

    fn take(&mut self, entry: Entry, buf: &mut Vec<u8>, lines: &mut u64, replies: &mut Vec<Reply>) {
        match entry {
            Entry::Refresh(done) => {
                self.live.store(Arc::new(self.tracker.report()));
                let _ = done.send(());
            }
            Entry::Decision(p) => {
                // Wall-clock milliseconds of `p.at`: the batch's clock reading less the time since.
                let at_ms =
                    self.clock.0.saturating_sub(
                        self.clock.1.saturating_duration_since(p.at).as_millis() as u64,
                    );
                let slot = match &self.last_window {
                    Some((key, slot)) if Arc::ptr_eq(key, &p.map) => *slot,
                    _ => {
                        let slot = self
                            .tracker
                            .slot(&p.map.model, &p.map.map_version, &*self.spec);
                        self.last_window = Some((p.map.clone(), slot));
                        slot
                    }
                };
                let audit_rate = self.tracker.decision_in(slot, p.confidence, p.accepted);
                if self.files.is_some() {
                    push_line(
                        buf,
                        &DecisionLine {
                            kind: "decision",
                            at_ms,
                            request_id: p.request_id.as_deref().unwrap_or(""),
                            model: &p.map.model,
                            map_version: &p.map.map_version,
                            predicted: p.predicted,
                            confidence: p.confidence,
                            accepted: p.accepted,
                            audit: p.audit,
                            audit_rate,
                            logits: p.logits.as_deref(),
                        },
                    );
                    *lines += 1;
                }
                if let Some(id) = p.request_id {
                    self.order.push_back((at_ms, id.clone()));
                    self.recent.insert(
                        id,
                        Recent {
                            at_ms,
                            map: p.map,
                            predicted: p.predicted,
                            confidence: p.confidence,
                            accepted: p.accepted,
                            audit: p.audit,
                            label: None,
                        },
                    );
                    self.forget_beyond_size();
                }
            }
            Entry::Outcome {
                request_id,
                label,
                reply,
            } => {
                let Some(d) = self.recent.get_mut(request_id.as_str()) else {
                    let _ = reply.send(Err(OutcomeError::Unknown(request_id)));
                    return;
                };
                if label >= d.map.classes {
                    let classes = d.map.classes;
                    let _ = reply.send(Err(OutcomeError::LabelOutOfRange {
                        request_id,
                        label,
                        classes,
                    }));
                    return;
                }
                let mut ack = OutcomeAck {
                    model: d.map.model.clone(),
                    map_version: d.map.map_version.clone(),
                    correct: d.predicted == label,
                    duplicate: false,
                    journaled: false,
                };
                match d.label {
                    Some(l) if l == label => {
                        ack.duplicate = true;
                        ack.journaled = self.files.is_some();
                        let _ = reply.send(Ok(ack));
                        return;
                    }
                    Some(l) => {
                        let _ = reply.send(Err(OutcomeError::Conflict {
                            request_id,
                            recorded: l,
                            given: label,
                        }));
                        return;
                    }
                    None => d.label = Some(label),
                }
                self.tracker.outcome(
                    &d.map.model,
                    &d.map.map_version,
                    LabelledDecision {
                        confidence: f64::from(d.confidence),
                        correct: d.predicted == label,
                        accepted: d.accepted,
                        audit: d.audit,
                    },
                    &*self.spec,
                );
                if self.files.is_some() {
                    push_line(
                        buf,
                        &Record::Outcome {
                            at_ms: now_ms(),
                            request_id,
                            model: d.map.model.clone(),
                            map_version: d.map.map_version.clone(),
                            true_label: label,
                            predicted: d.predicted,
                            accepted: d.accepted,
                            audit: d.audit,
                        },
                    );
                    *lines += 1;
                }
                replies.push((reply, ack));
            }
        }
    }

    /// Writes a batch; true when it reached the journal (and disk, with fsync).
    fn write(&mut self, buf: &[u8], lines: u64) -> bool {
        let Some(files) = self.files.as_mut() else {
            return false;
        };
        if buf.is_empty() {
            return true;
        }
        match files.append(buf, self.options.fsync) {
            Ok(()) => {
                self.stats.written.fetch_add(lines, Ordering::Relaxed);
                true
            }
            Err(e) => {
                let n = self.stats.write_errors.fetch_add(1, Ordering::Relaxed);
                self.stats.dropped.fetch_add(lines, Ordering::Relaxed);
                // Log the first failure and then every 1000th, not every batch of a full disk.
                if n.is_multiple_of(1000) {
                    tracing::error!(error = %e, dropped = lines, "journal write failed; records dropped, requests unaffected");
                }
                false
            }
        }
    }

    fn forget_beyond_size(&mut self) {
        while self.order.len() > self.options.remember {
            if let Some((at, id)) = self.order.pop_front() {
                if self.recent.get(&*id).is_some_and(|r| r.at_ms == at) {
                    self.recent.remove(&*id);
                }
            }
        }
    }

    fn forget_old(&mut self) {
        let cutoff = now_ms().saturating_sub(self.options.retention.as_millis() as u64);
        while let Some((at, id)) = self.order.front() {
            let over = self.order.len() > self.options.remember;
            if !over && *at >= cutoff {
                break;
            }
            // Remove only if the table still holds this arrival (an id reused later stays).
            if self.recent.get(&**id).is_some_and(|r| r.at_ms == *at) {
                self.recent.remove(&**id);
            }
            self.order.pop_front();
        }
    }
}

fn push_line<R: serde::Serialize>(buf: &mut Vec<u8>, r: &R) {
    // Serialising a plain struct to a Vec cannot fail.
    let _ = serde_json::to_writer(&mut *buf, r);
    buf.push(b'\n');
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::journal::read_journal;

    fn key() -> &'static Arc<MapKey> {
        static KEY: std::sync::OnceLock<Arc<MapKey>> = std::sync::OnceLock::new();
        KEY.get_or_init(|| {
            Arc::new(MapKey {
                model: "m".into(),
                map_version: "v1".into(),
                classes: 3,
            })
        })
    }

    fn decided(
        id: &str,
        predicted: u32,
        confidence: f32,
        accepted: bool,
        audit: bool,
    ) -> Decided<'_> {
        Decided {
            request_id: id,
            map: key(),
            predicted,
            confidence,
            accepted,
            audit,
            logits: vec![0.0, 1.0, 3.0],
            at: Instant::now(),
        }
    }

    #[tokio::test]
    async fn outcomes_join_once_and_are_journaled() {
        let dir = tempfile::tempdir().unwrap();
        let log = DecisionLog::spawn(JournalOptions {
            dir: Some(dir.path().to_owned()),
            fsync: true,
            ..JournalOptions::default()
        })
        .unwrap();
        log.decision(decided("a", 2, 0.9, true, true));
        log.decision(decided("b", 0, 0.4, false, false));
        let ack = log.outcome("a", 2).await.unwrap();
        assert!(ack.correct && ack.journaled && !ack.duplicate);
        let again = log.outcome("a", 2).await.unwrap();
        assert!(again.duplicate);
        assert!(matches!(
            log.outcome("a", 1).await,
            Err(OutcomeError::Conflict {
                recorded: 2,
                given: 1,
                ..
            })
        ));
        assert!(matches!(
            log.outcome("zzz", 1).await,
            Err(OutcomeError::Unknown(_))
        ));
        assert_eq!(log.outcome("", 1).await, Err(OutcomeError::EmptyId));
        assert!(matches!(
            log.outcome("b", 3).await,
            Err(OutcomeError::LabelOutOfRange { classes: 3, .. })
        ));
        let ack = log.outcome("b", 1).await.unwrap();
        assert!(!ack.correct);
        assert!(log.keeps_logits(), "a journal directory keeps the logits");
        let read = read_journal(dir.path()).unwrap();
        let Some(Record::Decision {
            model,
            map_version,
            logits,
            ..
        }) = read.records.first()
        else {
            panic!("the first record is a decision: {:?}", read.records.first());
        };
        assert_eq!((model.as_str(), map_version.as_str()), ("m", "v1"));
        assert_eq!(logits.as_deref(), Some(&[0.0f32, 1.0, 3.0][..]));
        let outcomes = read
            .records
            .iter()
            .filter(|r| matches!(r, Record::Outcome { .. }))
            .count();
        assert_eq!((read.records.len(), outcomes, read.torn), (4, 2, 0));
    }

    #[tokio::test]
    async fn an_outcome_and_a_refresh_wake_the_writer_instead_of_waiting_for_its_poll() {
        let log = DecisionLog::spawn(JournalOptions {
            poll: Duration::from_secs(3600),
            ..JournalOptions::default()
        })
        .unwrap();
        // Once the writer has found its queue empty it sleeps for the hour (it checks the
        // queue no more before it sleeps): only a wake-up gets the outcome joined in time.
        let sleeps = log.stats().clone();
        let asleep = |n: u64| {
            let sleeps = sleeps.clone();
            async move {
                while sleeps.sleeps.load(Ordering::Acquire) < n {
                    tokio::task::yield_now().await;
                }
            }
        };
        asleep(1).await;
        log.decision(decided("a", 2, 0.9, true, true));
        let limit = Duration::from_secs(30);
        let ack = tokio::time::timeout(limit, log.outcome("a", 2))
            .await
            .expect("the outcome woke the writer")
            .unwrap();
        assert!(ack.correct);
        // Asleep again: a refresh wakes it too, and sees the decision.
        asleep(2).await;
        log.decision(decided("b", 0, 0.9, true, false));
        let live = tokio::time::timeout(limit, log.live_now())
            .await
            .expect("the refresh woke the writer");
        assert_eq!(live.iter().map(|q| q.decisions_total).sum::<u64>(), 2);
    }

    #[tokio::test]
    async fn a_decision_is_journaled_at_the_wall_clock_time_of_its_instant() {
        let dir = tempfile::tempdir().unwrap();
        let log = DecisionLog::spawn(JournalOptions {
            dir: Some(dir.path().to_owned()),
            ..JournalOptions::default()
        })
        .unwrap();
        const AGO: Duration = Duration::from_secs(30);
        let before = now_ms();
        let then = Instant::now()
            .checked_sub(AGO)
            .expect("the clock runs 30 s back");
        log.decision(Decided {
            at: then,
            ..decided("old", 0, 0.9, true, false)
        });
        log.decision(decided("new", 0, 0.9, true, false));
        // The outcome is acknowledged after its batch is written, decisions included.
        log.outcome("new", 0).await.unwrap();
        let after = now_ms();
        let at = |id: &str| {
            read_journal(dir.path())
                .unwrap()
                .records
                .into_iter()
                .find_map(|r| match r {
                    Record::Decision {
                        at_ms, request_id, ..
                    } if request_id == id => Some(at_ms),
                    _ => None,
                })
                .unwrap()
        };
        let ago = AGO.as_millis() as u64;
        // Milliseconds are truncated on both sides: allow one either way.
        assert!(
            (before - 1..=after + 1).contains(&at("new")),
            "{before} {} {after}",
            at("new")
        );
        assert!(
            (before - ago - 1..=after - ago + 1).contains(&at("old")),
            "{before} {} {after}",
            at("old")
        );
    }

    #[test]
    fn the_oldest_decisions_are_forgotten_beyond_the_table_size() {
        let log = DecisionLog::spawn(JournalOptions {
            remember: 2,
            ..JournalOptions::default()
        })
        .unwrap();
        assert!(
            !log.keeps_logits(),
            "without a journal the logits are not copied"
        );
        for id in ["a", "b", "c"] {
            log.decision(decided(id, 0, 0.9, true, false));
        }
        let rt = tokio::runtime::Builder::new_current_thread()
            .build()
            .unwrap();
        assert!(matches!(
            rt.block_on(log.outcome("a", 0)),
            Err(OutcomeError::Unknown(_))
        ));
        assert!(rt.block_on(log.outcome("c", 0)).is_ok());
    }
}
