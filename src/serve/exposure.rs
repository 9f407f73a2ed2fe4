//! The exposure log: what was served, one JSON line a request, written off the request path so
//! `medley replay` can evaluate other settings on the traffic a slice actually saw.
//!
//! A line is `{"ts": RFC 3339 UTC, "request": <the request object as received>, "served":
//! {request_id, slice, arm, algorithm, lambda, k, config_generation, config_digest, items,
//! catalog_version?}}`. The request is the body's own bytes (JSON front ends) or the decoded
//! request (gRPC), encoded as JSON by the writer thread; line breaks in a body, legal only as
//! JSON whitespace, become spaces.
//!
//! The request path only decides whether a request is sampled and hands a record to
//! [`ExposureLog::submit`], which never blocks: the queue is a bounded channel (in records and
//! in bytes, since a record holds its request body), and a full queue drops the record and
//! counts it in `medley_exposure_log_dropped_total`. One thread (`medley-exposure`) encodes and
//! writes, flushes to the OS whenever the queue runs empty, rotates to a new file past
//! `max_file_bytes` (fsyncing the old one), and on [`ExposureLog::stop`] drains the queue and
//! fsyncs before returning. A write error (full disk) loses that record, counts it in
//! `medley_exposure_log_write_errors_total`, and the next record opens a new file.
//!
//! Files are `exposure-<UTC start time>-<seq>.jsonl` in `dir`, created with `create_new` so two
//! processes sharing a directory never write the same file. With `compress = true` they are
//! `.jsonl.zst`: lines gather for up to 1 s or 1 MiB and go out as one zstd
//! frame each (ruzstd's encoder, pure Rust), so every file is a valid multi-frame zstd stream
//! and a crash loses at most the queue, the frame being gathered and a partial last frame.

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, AtomicUsize, Ordering};
use std::sync::mpsc::{sync_channel, Receiver, SyncSender, TryRecvError, TrySendError};
use std::sync::{Arc, Mutex};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use axum::body::Bytes;
use serde::Serialize;

use crate::serve::config::{fnv1a64, mix64, ExposureLogSettings};
use crate::serve::metrics::Metrics;

/// The request as it goes into the log.
#[derive(Debug)]
pub enum LoggedRequest {
    /// A JSON body (or stream line) as received.
    Json(Bytes),
    /// A decoded request (gRPC), encoded as JSON by the writer thread, off the request path.
    Decoded(Box<crate::api::wire::RerankRequest>),
}

impl LoggedRequest {
    /// Bytes it holds, roughly (a decoded embedding value counts as its JSON text would).
    fn weight(&self) -> usize {
        match self {
            Self::Json(b) => b.len(),
            Self::Decoded(r) => r
                .candidates
                .iter()
                .map(|c| 64 + c.id.len() + c.embedding.as_ref().map_or(0, |e| 12 * e.len()))
                .sum(),
        }
    }

    /// Appends the request object's JSON text to `out`, on one line.
    fn write_json(&self, out: &mut Vec<u8>) {
        match self {
            Self::Json(b) => {
                // JSON allows raw line breaks only as whitespace between tokens (inside strings
                // they are escaped), so turning them into spaces keeps the document and makes it
                // one line.
                let body = b.trim_ascii();
                if body.contains(&b'\n') || body.contains(&b'\r') {
                    out.extend(body.iter().map(|&b| if b == b'\n' || b == b'\r' { b' ' } else { b }));
                } else {
                    // The usual case (a compact body): one copy at memcpy speed.
                    out.extend_from_slice(body);
                }
            }
            // serde_json writes no raw line breaks; a request that decoded serialises.
            Self::Decoded(r) => {
                if serde_json::to_writer(&mut *out, r).is_err() {
                    out.extend_from_slice(b"null");
                }
            }
        }
    }
}

/// The `served` object of a line.
#[derive(Debug, Serialize)]
pub struct ServedRecord {
    /// The request's id, or the UUID v7 assigned to it.
    pub request_id: String,
    /// Slice.
    pub slice: String,
    /// Arm.
    pub arm: String,
    /// Diversifier.
    pub algorithm: &'static str,
    /// Lambda.
    pub lambda: f64,
    /// k as requested.
    pub k: u64,
    /// Config generation.
    pub config_generation: u64,
    /// [`crate::serve::config::Config::digest`] of the config that served it.
    pub config_digest: String,
    /// Ids in slate order.
    pub items: Vec<String>,
    /// Catalog version, when a catalog served it.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub catalog_version: Option<String>,
}

/// One record: when it was served, what was asked, what was served.
#[derive(Debug)]
pub struct Record {
    /// When the answer was built.
    pub ts: chrono::DateTime<chrono::Utc>,
    /// The request.
    pub request: LoggedRequest,
    /// The answer.
    pub served: ServedRecord,
}

impl Record {
    /// Bytes this record holds while queued (its request and ids, roughly).
    fn weight(&self) -> usize {
        self.request.weight() + self.served.items.iter().map(|i| i.len() + 24).sum::<usize>() + 256
    }

    /// The JSON line, newline included.
    fn encode(&self, out: &mut Vec<u8>) {
        out.clear();
        out.extend_from_slice(b"{\"ts\":\"");
        out.extend_from_slice(self.ts.to_rfc3339_opts(chrono::SecondsFormat::Micros, true).as_bytes());
        out.extend_from_slice(b"\",\"request\":");
        self.request.write_json(out);
        out.extend_from_slice(b",\"served\":");
        // Strings, integers and a finite f64: serialising cannot fail.
        let _ = serde_json::to_writer(&mut *out, &self.served);
        out.extend_from_slice(b"}\n");
    }
}

/// Whether a request is in the log's sample: a stable hash of `unit_id` when there is one (a
/// sampled unit is logged on every request), else a SplitMix64 stream over a process-wide
/// counter.
#[must_use]
pub fn sampled(rate: f64, unit_id: Option<&str>) -> bool {
    static COUNTER: AtomicU64 = AtomicU64::new(0x2545_f491_4f6c_dd1d);
    if rate >= 1.0 {
        return true;
    }
    if rate <= 0.0 {
        return false;
    }
    let z = match unit_id {
        Some(unit) => mix64(fnv1a64(b"exposure\0".iter().chain(unit.as_bytes()))),
        None => mix64(COUNTER.fetch_add(0x9e37_79b9_7f4a_7c15, Ordering::Relaxed)),
    };
    ((z >> 11) as f64) / ((1u64 << 53) as f64) < rate
}

/// A fresh request id for a logged request that came without one: a UUID v7 (RFC 9562), time
/// ordered, so ids sort by arrival.
#[must_use]
pub fn new_request_id() -> String {
    uuid::Uuid::now_v7().to_string()
}

enum Message {
    Record(Box<Record>, usize),
    Stop,
}

/// The bounded queue and the writer thread.
#[derive(Debug)]
pub struct ExposureLog {
    tx: SyncSender<Message>,
    pending: Arc<AtomicUsize>,
    queue_bytes: usize,
    metrics: Arc<Metrics>,
    worker: Mutex<Option<JoinHandle<()>>>,
    dir: PathBuf,
}

impl std::fmt::Debug for Message {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            Self::Record(..) => "Record",
            Self::Stop => "Stop",
        })
    }
}

impl ExposureLog {
    /// Creates `settings.dir` if needed and starts the writer.
    ///
    /// # Errors
    /// When the directory cannot be created, or the OS refuses to start the thread.
    pub fn start(settings: &ExposureLogSettings, metrics: Arc<Metrics>) -> std::io::Result<Self> {
        std::fs::create_dir_all(&settings.dir).map_err(|e| {
            std::io::Error::new(
                e.kind(),
                format!("creating exposure_log.dir {}: {e}", settings.dir.display()),
            )
        })?;
        let (tx, rx) = sync_channel(settings.queue);
        let pending = Arc::new(AtomicUsize::new(0));
        let writer = Writer {
            dir: settings.dir.clone(),
            max_file_bytes: settings.max_file_bytes,
            metrics: metrics.clone(),
            pending: pending.clone(),
            current: None,
            seq: 0,
            last_warning: None,
            compress: settings.compress,
            frame: Vec::new(),
            frame_records: 0,
            frame_started: None,
        };
        let worker =
            std::thread::Builder::new().name("medley-exposure".into()).spawn(move || writer.run(&rx))?;
        Ok(Self {
            tx,
            pending,
            queue_bytes: settings.queue_bytes,
            metrics,
            worker: Mutex::new(Some(worker)),
            dir: settings.dir.clone(),
        })
    }

    /// The directory written to.
    #[must_use]
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// Queues a record; drops it (and counts the drop) when the queue is full in records or
    /// bytes. Never blocks.
    pub fn submit(&self, record: Record) {
        let weight = record.weight();
        if self.pending.fetch_add(weight, Ordering::Relaxed) + weight > self.queue_bytes {
            self.pending.fetch_sub(weight, Ordering::Relaxed);
            self.metrics.exposure_dropped.inc();
            return;
        }
        match self.tx.try_send(Message::Record(Box::new(record), weight)) {
            Ok(()) => {}
            Err(TrySendError::Full(_) | TrySendError::Disconnected(_)) => {
                self.pending.fetch_sub(weight, Ordering::Relaxed);
                self.metrics.exposure_dropped.inc();
            }
        }
    }

    /// Writes every queued record, fsyncs, and joins the writer. Blocks; call it off the
    /// runtime, after the front ends have stopped submitting.
    pub fn stop(&self) {
        let _ = self.tx.send(Message::Stop);
        let handle = self.worker.lock().map(|mut w| w.take()).unwrap_or(None);
        if let Some(handle) = handle {
            let _ = handle.join();
        }
    }
}

/// The file being written.
struct Current {
    out: BufWriter<File>,
    bytes: u64,
    path: PathBuf,
}

struct Writer {
    dir: PathBuf,
    max_file_bytes: u64,
    metrics: Arc<Metrics>,
    pending: Arc<AtomicUsize>,
    current: Option<Current>,
    seq: u64,
    last_warning: Option<Instant>,
    /// `compress`: lines gather in `frame` and go out as one zstd frame each.
    compress: bool,
    frame: Vec<u8>,
    frame_records: u64,
    frame_started: Option<Instant>,
}

/// A compressed log's frame goes out once it holds this many bytes of lines...
const FRAME_BYTES: usize = 1 << 20;
/// ...or once its first line is this old.
const FRAME_AGE: Duration = Duration::from_secs(1);

impl Writer {
    fn run(mut self, rx: &Receiver<Message>) {
        let mut line = Vec::with_capacity(64 << 10);
        loop {
            let message = match rx.try_recv() {
                Ok(m) => m,
                Err(TryRecvError::Empty) => {
                    // The queue ran empty: hand what is buffered to the OS, so a crash of the
                    // process loses at most the queue (and, compressing, the frame being
                    // gathered: at most FRAME_AGE of records).
                    let age = self.frame_started.map(|t| t.elapsed());
                    match age {
                        Some(age) if age >= FRAME_AGE => {
                            self.emit_frame();
                            self.flush();
                            continue;
                        }
                        Some(age) => match rx.recv_timeout(FRAME_AGE - age) {
                            Ok(m) => m,
                            Err(std::sync::mpsc::RecvTimeoutError::Timeout) => continue,
                            Err(std::sync::mpsc::RecvTimeoutError::Disconnected) => break,
                        },
                        None => {
                            self.flush();
                            match rx.recv() {
                                Ok(m) => m,
                                Err(_) => break,
                            }
                        }
                    }
                }
                Err(TryRecvError::Disconnected) => break,
            };
            match message {
                Message::Stop => break,
                Message::Record(record, weight) => {
                    record.encode(&mut line);
                    drop(record);
                    self.pending.fetch_sub(weight, Ordering::Relaxed);
                    if self.compress {
                        self.gather(&line);
                        continue;
                    }
                    match self.write(&line) {
                        Ok(()) => self.metrics.exposure_records.inc(),
                        Err(e) => self.failed(&e, 1),
                    }
                }
            }
        }
        self.emit_frame();
        self.close();
    }

    /// A failed write of `records` records: counted, warned about, and the file given up (the
    /// next record opens a new one; the failed file keeps what it has).
    fn failed(&mut self, e: &std::io::Error, records: u64) {
        self.metrics.exposure_write_errors.inc_by(records);
        self.warn(e);
        self.current = None;
    }

    /// Adds a line to the frame being gathered; sends the frame when it is full or old.
    fn gather(&mut self, line: &[u8]) {
        self.frame.extend_from_slice(line);
        self.frame_records += 1;
        let started = *self.frame_started.get_or_insert_with(Instant::now);
        if self.frame.len() >= FRAME_BYTES || started.elapsed() >= FRAME_AGE {
            self.emit_frame();
        }
    }

    /// Compresses the gathered lines into one zstd frame (ruzstd's fastest level, about zstd's
    /// level 1) and writes it; a file of such frames is one valid zstd stream.
    fn emit_frame(&mut self) {
        if self.frame.is_empty() {
            return;
        }
        let compressed =
            ruzstd::encoding::compress_to_vec(&self.frame[..], ruzstd::encoding::CompressionLevel::Fastest);
        let records = std::mem::take(&mut self.frame_records);
        self.frame.clear();
        self.frame_started = None;
        match self.write(&compressed) {
            Ok(()) => self.metrics.exposure_records.inc_by(records),
            Err(e) => self.failed(&e, records),
        }
    }

    fn write(&mut self, line: &[u8]) -> std::io::Result<()> {
        let rotate = self
            .current
            .as_ref()
            .is_some_and(|c| c.bytes > 0 && c.bytes + line.len() as u64 > self.max_file_bytes);
        if rotate {
            self.close();
        }
        if self.current.is_none() {
            self.current = Some(self.open()?);
        }
        let Some(current) = &mut self.current else { return Ok(()) };
        current.out.write_all(line)?;
        current.bytes += line.len() as u64;
        Ok(())
    }

    /// Opens the next file: `exposure-<UTC now>-<seq>.jsonl` (`.jsonl.zst` compressing), never
    /// one that exists.
    fn open(&mut self) -> std::io::Result<Current> {
        std::fs::create_dir_all(&self.dir)?;
        let stamp = chrono::Utc::now().format("%Y%m%dT%H%M%SZ");
        loop {
            self.seq += 1;
            let extension = if self.compress { "jsonl.zst" } else { "jsonl" };
            let path = self.dir.join(format!("exposure-{stamp}-{:06}.{extension}", self.seq));
            match std::fs::OpenOptions::new().write(true).create_new(true).open(&path) {
                Ok(file) => {
                    tracing::info!(path = %path.display(), "exposure log file opened");
                    return Ok(Current { out: BufWriter::with_capacity(1 << 20, file), bytes: 0, path });
                }
                Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => {}
                Err(e) => return Err(e),
            }
        }
    }

    fn flush(&mut self) {
        if let Some(c) = &mut self.current {
            if let Err(e) = c.out.flush() {
                self.metrics.exposure_write_errors.inc();
                self.warn(&e);
                self.current = None;
            }
        }
    }

    /// Flushes and fsyncs the current file and closes it.
    fn close(&mut self) {
        if let Some(mut c) = self.current.take() {
            let synced = c.out.flush().and_then(|()| c.out.get_ref().sync_all());
            if let Err(e) = synced {
                self.metrics.exposure_write_errors.inc();
                self.warn(&e);
            } else {
                tracing::debug!(path = %c.path.display(), bytes = c.bytes, "exposure log file closed");
            }
        }
    }

    /// Logs a write failure at most every 10 s.
    fn warn(&mut self, e: &std::io::Error) {
        if self.last_warning.is_none_or(|t| t.elapsed() >= Duration::from_secs(10)) {
            self.last_warning = Some(Instant::now());
            tracing::warn!(error = %e, dir = %self.dir.display(), "exposure log write failed; records are being lost");
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A log in `dir` logging every request, with the given sizes.
    fn start(
        dir: &Path,
        max_file_bytes: u64,
        queue: usize,
        queue_bytes: usize,
        compress: bool,
        metrics: &Arc<Metrics>,
    ) -> ExposureLog {
        let settings = ExposureLogSettings {
            dir: dir.to_path_buf(),
            sample_rate: 1.0,
            max_file_bytes,
            queue,
            queue_bytes,
            compress,
        };
        ExposureLog::start(&settings, metrics.clone()).unwrap()
    }

    fn served(id: &str) -> ServedRecord {
        ServedRecord {
            request_id: id.into(),
            slice: "default".into(),
            arm: "default".into(),
            algorithm: "dpp",
            lambda: 0.3,
            k: 2,
            config_generation: 1,
            config_digest: "00".into(),
            items: vec!["a".into(), "b\"".into()],
            catalog_version: None,
        }
    }

    #[test]
    fn a_line_is_one_json_document_with_the_body_as_sent() {
        let body = Bytes::from_static(b" {\"candidates\":\r\n [{\"id\":\"a\\nb\",\"score\":1}]}\n");
        let record = Record {
            ts: chrono::DateTime::from_timestamp(1_764_806_400, 123_456_000).unwrap(),
            request: LoggedRequest::Json(body),
            served: served("r1"),
        };
        let mut line = Vec::new();
        record.encode(&mut line);
        assert_eq!(line.iter().filter(|&&b| b == b'\n').count(), 1);
        assert!(line.ends_with(b"\n"));
        let v: serde_json::Value = serde_json::from_slice(&line).unwrap();
        assert_eq!(v["ts"], "2025-12-04T00:00:00.123456Z");
        assert_eq!(v["request"]["candidates"][0]["id"], "a\nb", "escaped newline in a string is kept");
        assert_eq!(v["served"]["items"][1], "b\"");
        assert_eq!(v["served"]["request_id"], "r1");
        assert!(v["served"].get("catalog_version").is_none());
    }

    /// A decoded (gRPC) request is written as the JSON body that decodes back to it, f32
    /// embeddings and f64 scores bit for bit.
    #[test]
    fn a_decoded_request_is_logged_as_json_that_decodes_to_it() {
        let request = crate::api::wire::RerankRequest {
            request_id: Some("g1".into()),
            unit_id: Some("u".into()),
            k: Some(2),
            candidates: vec![
                crate::api::wire::WireCandidate {
                    id: "a".into(),
                    score: 0.1 + 0.2,
                    category: Some("x".into()),
                    embedding: Some(vec![0.1, -3.4e-7, 1.0 / 3.0]),
                    ..Default::default()
                },
                crate::api::wire::WireCandidate { id: "b".into(), score: -1e300, ..Default::default() },
            ],
            ..Default::default()
        };
        let record = Record {
            ts: chrono::Utc::now(),
            request: LoggedRequest::Decoded(Box::new(request.clone())),
            served: served("g1"),
        };
        let mut line = Vec::new();
        record.encode(&mut line);
        let v: serde_json::Value = serde_json::from_slice(&line).unwrap();
        let text = serde_json::to_vec(&v["request"]).unwrap();
        let back = crate::api::wire::decode_request(&text).unwrap();
        assert_eq!(back, request);
        assert!(v["request"].get("slice").is_none(), "absent fields stay absent");
    }

    #[test]
    fn unit_sampling_is_stable_and_near_the_rate() {
        let units: Vec<String> = (0..20_000).map(|i| format!("u{i}")).collect();
        let first: Vec<bool> = units.iter().map(|u| sampled(0.25, Some(u))).collect();
        let again: Vec<bool> = units.iter().map(|u| sampled(0.25, Some(u))).collect();
        assert_eq!(first, again, "a unit is in or out on every request");
        let share = first.iter().filter(|&&s| s).count() as f64 / units.len() as f64;
        // Binomial(20000, 0.25): sd 0.0031; 5 sd.
        assert!((share - 0.25).abs() < 0.016, "{share}");
        let per_request = (0..20_000).filter(|_| sampled(0.25, None)).count() as f64 / 20_000.0;
        assert!((per_request - 0.25).abs() < 0.016, "{per_request}");
        assert!(sampled(1.0, None) && !sampled(0.0, Some("u1")));
    }

    #[test]
    fn request_ids_are_uuid_v7() {
        let (a, b) = (new_request_id(), new_request_id());
        assert_eq!(a.len(), 36);
        assert_eq!(&a[14..15], "7", "version nibble (RFC 9562 §5.7)");
        assert!(matches!(&a[19..20], "8" | "9" | "a" | "b"), "variant bits 10");
        assert_ne!(a, b);
    }

    #[test]
    fn the_writer_rotates_drains_on_stop_and_counts() {
        let dir = std::env::temp_dir().join(format!("medley-exposure-unit-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        let metrics = Arc::new(Metrics::new());
        let log = start(&dir, 4096, 1000, 1 << 30, false, &metrics);
        let body = Bytes::from(format!("{{\"pad\":\"{}\"}}", "x".repeat(900)));
        for i in 0..40 {
            log.submit(Record {
                ts: chrono::Utc::now(),
                request: LoggedRequest::Json(body.clone()),
                served: served(&format!("r{i}")),
            });
        }
        log.stop();
        let mut files: Vec<PathBuf> = std::fs::read_dir(&dir).unwrap().map(|e| e.unwrap().path()).collect();
        files.sort();
        assert!(files.len() >= 10, "about 1.1 KB a line, 4 KiB a file: {}", files.len());
        let mut ids = Vec::new();
        for f in &files {
            let name = f.file_name().unwrap().to_str().unwrap();
            assert!(name.starts_with("exposure-") && name.ends_with(".jsonl"), "{name}");
            let text = std::fs::read_to_string(f).unwrap();
            assert!(text.len() <= 4096 || text.lines().count() == 1);
            for line in text.lines() {
                let v: serde_json::Value = serde_json::from_str(line).unwrap();
                ids.push(v["served"]["request_id"].as_str().unwrap().to_owned());
            }
        }
        assert_eq!(ids, (0..40).map(|i| format!("r{i}")).collect::<Vec<_>>(), "all written, in order");
        assert_eq!(metrics.exposure_records.get(), 40);
        assert_eq!(metrics.exposure_dropped.get(), 0);
        std::fs::remove_dir_all(&dir).unwrap();
    }

    /// `compress = true`: files of zstd frames, each a run of whole lines, decoded here with
    /// ruzstd's decoder; rotation counts compressed bytes; stop writes the last frame.
    #[test]
    fn compressed_files_are_zstd_frames_of_whole_lines() {
        use std::io::Read as _;
        let dir = std::env::temp_dir().join(format!("medley-exposure-zst-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        let metrics = Arc::new(Metrics::new());
        let log = start(&dir, 4096, 10_000, 1 << 30, true, &metrics);
        // 3 000 lines of about 1.1 KB: several 1 MiB frames, so several 4 KiB files.
        for i in 0..3000 {
            let body = Bytes::from(format!("{{\"n\":{i},\"pad\":\"{}\"}}", "ab".repeat(500)));
            log.submit(Record {
                ts: chrono::Utc::now(),
                request: LoggedRequest::Json(body),
                served: served(&format!("r{i}")),
            });
        }
        log.stop();
        let mut files: Vec<PathBuf> = std::fs::read_dir(&dir).unwrap().map(|e| e.unwrap().path()).collect();
        files.sort();
        assert!(files.len() >= 2, "{files:?}");
        let mut ids = Vec::new();
        for f in &files {
            assert!(f.to_str().unwrap().ends_with(".jsonl.zst"));
            let bytes = std::fs::read(f).unwrap();
            let mut rest = &bytes[..];
            let mut text = String::new();
            while !rest.is_empty() {
                let mut frame = ruzstd::decoding::StreamingDecoder::new(&mut rest).unwrap();
                frame.read_to_string(&mut text).unwrap();
                assert!(text.ends_with('\n'), "a frame ends on a whole line");
            }
            for line in text.lines() {
                let v: serde_json::Value = serde_json::from_str(line).unwrap();
                ids.push(v["served"]["request_id"].as_str().unwrap().to_owned());
            }
        }
        assert_eq!(ids, (0..3000).map(|i| format!("r{i}")).collect::<Vec<_>>());
        assert_eq!(metrics.exposure_records.get(), 3000);
        std::fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn a_full_queue_drops_and_counts_without_blocking() {
        let dir = std::env::temp_dir().join(format!("medley-exposure-full-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        let metrics = Arc::new(Metrics::new());
        // A byte budget of one record: while the writer holds none, the second of two quick
        // submissions may pass; of 200 submissions far more than half are refused.
        let log = start(&dir, 1 << 20, 1, 2000, false, &metrics);
        let body = Bytes::from(format!("{{\"pad\":\"{}\"}}", "x".repeat(1500)));
        for i in 0..200 {
            log.submit(Record {
                ts: chrono::Utc::now(),
                request: LoggedRequest::Json(body.clone()),
                served: served(&format!("r{i}")),
            });
        }
        log.stop();
        let (written, dropped) = (metrics.exposure_records.get(), metrics.exposure_dropped.get());
        assert_eq!(written + dropped, 200);
        assert!(dropped > 0, "written {written}");
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
