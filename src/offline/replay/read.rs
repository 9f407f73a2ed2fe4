//! Reading logged traffic as a stream of validated slates, a bounded chunk at a time.
//!
//! Two line formats, told apart by a `"served"` key:
//! - the corpus format: a re-rank request plus `"clicked": [ids]` (what `medley sample
//!   --with-clicks` writes);
//! - the exposure log (`{"ts": ..., "request": {...}, "served": {...}}`, what `medley serve`
//!   writes with `[exposure_log]`): the request as received and the slate served, whose order
//!   gives each shown item its logged rank.
//!
//! `--input` is a file or a directory of them (`*.jsonl`, `*.json`, `*.ndjson`, each optionally
//! `.zst`), read in name order; `.zst` files are zstd-decompressed on the fly (all frames).
//! `--clicks` joins `{"request_id", "clicked"}` lines by request id (an exposure line's id is
//! `served.request_id`). Lines are validated with the server's own validation, in parallel
//! chunks of at most [`CHUNK_LINES`] lines and [`CHUNK_BYTES`] bytes, so memory is bounded by the
//! chunk, the click table and the item numbering, never by the number of slates.

use std::collections::HashMap;
use std::io::{BufRead, BufReader, Read};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

use anyhow::Context as _;
use rayon::prelude::*;
use serde::Deserialize;

use crate::api::wire::{self, RerankRequest};
use crate::serve::engine::Engine;
use medley_core::bootstrap::{key_of_id, key_of_line};

/// Most lines validated together.
pub const CHUNK_LINES: usize = 2048;
/// Most bytes of line text held at once (a chunk ends early past it).
pub const CHUNK_BYTES: usize = 64 << 20;

/// A corpus line.
#[derive(Debug, Deserialize)]
struct CorpusLine {
    #[serde(flatten)]
    request: RerankRequest,
    #[serde(default)]
    clicked: Vec<String>,
}

/// An exposure-log line.
#[derive(Debug, Deserialize)]
struct ExposureLine {
    request: RerankRequest,
    served: ServedLine,
    /// Clicks may also be written into the line by whoever joined them.
    #[serde(default)]
    clicked: Vec<String>,
}

#[derive(Debug, Deserialize)]
struct ServedLine {
    #[serde(default)]
    request_id: Option<String>,
    #[serde(default)]
    items: Vec<String>,
}

pub use medley_core::replay::LoggedSlate as Slate;

/// Clicks by request id, from `--clicks`.
#[derive(Debug, Default)]
pub struct Clicks {
    by_request: HashMap<String, Vec<String>>,
    /// Click lines read.
    pub lines: u64,
}

impl Clicks {
    /// Reads a clicks file: one `{"request_id": "...", "clicked": ["id", ...]}` a line; lines of
    /// one request id add up.
    ///
    /// # Errors
    /// I/O errors, or a line that is not such an object (naming the line).
    pub fn read(path: &Path) -> anyhow::Result<Self> {
        #[derive(Deserialize)]
        struct Line {
            request_id: String,
            clicked: Vec<String>,
        }
        let mut clicks = Self::default();
        let reader = open(path, None)?;
        for (n, line) in reader.lines().enumerate() {
            let line = line.with_context(|| format!("reading {}", path.display()))?;
            if line.trim().is_empty() {
                continue;
            }
            let parsed: Line = serde_json::from_str(&line).with_context(|| {
                format!("{}:{}: want {{\"request_id\": ..., \"clicked\": [...]}}", path.display(), n + 1)
            })?;
            clicks.lines += 1;
            clicks.by_request.entry(parsed.request_id).or_default().extend(parsed.clicked);
        }
        Ok(clicks)
    }
}

/// What reading reported besides slates.
#[derive(Debug, Default, Clone)]
pub struct ReadStats {
    /// Non-blank lines read.
    pub lines: u64,
    /// Lines that became slates.
    pub slates: u64,
    /// Lines skipped for having no clicks (after the join).
    pub without_clicks: u64,
    /// Lines skipped as invalid, and where the first few were and why.
    pub invalid: u64,
    /// The first invalid lines (`file:line`) and why.
    pub first_invalid: Vec<(String, String)>,
    /// Files whose last line was cut short (no newline, not a document): a crash mid-write.
    pub partial_last_lines: Vec<String>,
    /// Slates that carried the served slate.
    pub with_served: u64,
    /// Distinct items offered.
    pub items: usize,
}

/// The files behind `--input`, in the order they are read.
///
/// # Errors
/// When the path does not exist, or a directory holds no log files.
pub fn list_inputs(path: &Path) -> anyhow::Result<Vec<PathBuf>> {
    let meta = std::fs::metadata(path).with_context(|| format!("reading {}", path.display()))?;
    if !meta.is_dir() {
        return Ok(vec![path.to_path_buf()]);
    }
    let mut files: Vec<PathBuf> = std::fs::read_dir(path)
        .with_context(|| format!("listing {}", path.display()))?
        .filter_map(Result::ok)
        .map(|e| e.path())
        .filter(|p| {
            let name = p.file_name().and_then(|n| n.to_str()).unwrap_or("");
            let name = name.strip_suffix(".zst").unwrap_or(name);
            p.is_file() && [".jsonl", ".json", ".ndjson"].iter().any(|e| name.ends_with(e))
        })
        .collect();
    files.sort();
    anyhow::ensure!(
        !files.is_empty(),
        "{} holds no .jsonl, .json or .ndjson files (optionally .zst)",
        path.display()
    );
    Ok(files)
}

/// Counts the bytes read from a file (the progress bar's position).
struct Counting<R> {
    inner: R,
    read: Arc<AtomicU64>,
}

impl<R: Read> Read for Counting<R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.read.fetch_add(n as u64, Ordering::Relaxed);
        Ok(n)
    }
}

/// Every zstd frame of a stream, one after another (the format allows several in one file).
struct ZstdFrames<R: BufRead> {
    decoder: Option<ruzstd::decoding::StreamingDecoder<R, ruzstd::decoding::FrameDecoder>>,
}

impl<R: BufRead> Read for ZstdFrames<R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        loop {
            let Some(decoder) = self.decoder.as_mut() else { return Ok(0) };
            let n = decoder.read(buf)?;
            if n > 0 || buf.is_empty() {
                return Ok(n);
            }
            // This frame is done; another may follow.
            let Some(finished) = self.decoder.take() else { return Ok(0) };
            let mut source = finished.into_inner();
            if source.fill_buf()?.is_empty() {
                return Ok(0);
            }
            self.decoder = Some(
                ruzstd::decoding::StreamingDecoder::new(source)
                    .map_err(|e| std::io::Error::new(std::io::ErrorKind::InvalidData, e.to_string()))?,
            );
        }
    }
}

/// Opens a file for reading lines, decompressing `.zst`.
fn open(path: &Path, read: Option<Arc<AtomicU64>>) -> anyhow::Result<Box<dyn BufRead + Send>> {
    let file = std::fs::File::open(path).with_context(|| format!("opening {}", path.display()))?;
    let counted = Counting { inner: file, read: read.unwrap_or_default() };
    if path.extension().is_some_and(|e| e == "zst") {
        // An empty file (a log opened, then stopped or killed before its first frame) holds no
        // lines.
        if std::fs::metadata(path).is_ok_and(|m| m.len() == 0) {
            return Ok(Box::new(std::io::empty()));
        }
        let source = BufReader::with_capacity(1 << 20, counted);
        let decoder = ruzstd::decoding::StreamingDecoder::new(source)
            .map_err(|e| anyhow::anyhow!("{}: not zstd: {e}", path.display()))?;
        Ok(Box::new(BufReader::with_capacity(1 << 20, ZstdFrames { decoder: Some(decoder) })))
    } else {
        Ok(Box::new(BufReader::with_capacity(1 << 20, counted)))
    }
}

/// A stream of validated slates over the input files, a chunk at a time.
pub struct Reader<'a> {
    engine: &'a Engine,
    clicks: Option<&'a Clicks>,
    files: Vec<PathBuf>,
    next_file: usize,
    current: Option<(Box<dyn BufRead + Send>, String, u64)>,
    /// Line number over all files (the bootstrap key of a line without a request id).
    number: u64,
    items: HashMap<String, u32>,
    /// Bytes read from the files so far.
    pub bytes_read: Arc<AtomicU64>,
    /// What was skipped and counted.
    pub stats: ReadStats,
}

/// A line as read: where it came from and whether it ended with a newline.
struct RawLine {
    file_line: u64,
    number: u64,
    bytes: Vec<u8>,
    complete: bool,
    last: bool,
}

impl<'a> Reader<'a> {
    /// A reader over `files`, validating with `engine` (its default slice must be unlocked) and
    /// joining `clicks` when given.
    #[must_use]
    pub fn new(engine: &'a Engine, files: Vec<PathBuf>, clicks: Option<&'a Clicks>) -> Self {
        Self {
            engine,
            clicks,
            files,
            next_file: 0,
            current: None,
            number: 0,
            items: HashMap::new(),
            bytes_read: Arc::default(),
            stats: ReadStats::default(),
        }
    }

    /// A reader over one stream already open (lines in memory, say), named `name` in reports.
    #[must_use]
    pub fn over(
        engine: &'a Engine,
        stream: Box<dyn BufRead + Send>,
        name: &str,
        clicks: Option<&'a Clicks>,
    ) -> Self {
        let mut reader = Self::new(engine, Vec::new(), clicks);
        reader.current = Some((stream, name.to_owned(), 0));
        reader
    }

    /// Reads one line, moving to the next file at the end of one; `None` at the end of all.
    fn read_line(&mut self) -> anyhow::Result<Option<(RawLine, String)>> {
        loop {
            if self.current.is_none() {
                let Some(path) = self.files.get(self.next_file).cloned() else { return Ok(None) };
                self.next_file += 1;
                let name = path.display().to_string();
                let reader = match open(&path, Some(self.bytes_read.clone())) {
                    Ok(reader) => reader,
                    // A compressed log a crash cut short before its first frame was whole.
                    Err(e) if name.ends_with(".zst") && path.is_file() => {
                        self.stats
                            .partial_last_lines
                            .push(format!("{name}:1 (zstd stream cut short: {e:#})"));
                        continue;
                    }
                    Err(e) => return Err(e),
                };
                self.current = Some((reader, name, 0));
            }
            let Some((reader, name, line_no)) = self.current.as_mut() else { continue };
            let mut bytes = Vec::new();
            let n = match reader.read_until(b'\n', &mut bytes) {
                Ok(n) => n,
                // A compressed log whose last frame a crash cut short: what decoded is kept.
                Err(e) if name.ends_with(".zst") => {
                    let at = format!("{name}:{} (zstd stream cut short: {e})", *line_no + 1);
                    self.stats.partial_last_lines.push(at);
                    self.current = None;
                    continue;
                }
                Err(e) => return Err(anyhow::Error::new(e).context(format!("reading {name}"))),
            };
            if n == 0 {
                self.current = None;
                continue;
            }
            *line_no += 1;
            self.number += 1;
            let complete = bytes.ends_with(b"\n");
            let last = !complete || reader.fill_buf().map(<[u8]>::is_empty).unwrap_or(true);
            let raw = RawLine { file_line: *line_no, number: self.number, bytes, complete, last };
            return Ok(Some((raw, name.clone())));
        }
    }

    /// The next chunk of validated slates; `None` once the input is exhausted.
    ///
    /// # Errors
    /// I/O errors (invalid lines are skipped and counted, not errors).
    pub fn next_chunk(&mut self) -> anyhow::Result<Option<Vec<Slate>>> {
        let mut chunk: Vec<(RawLine, String)> = Vec::new();
        let mut held = 0;
        while chunk.len() < CHUNK_LINES && held < CHUNK_BYTES {
            let Some((line, name)) = self.read_line()? else { break };
            if line.bytes.trim_ascii().is_empty() {
                continue;
            }
            held += line.bytes.len();
            chunk.push((line, name));
        }
        if chunk.is_empty() {
            return Ok(None);
        }
        let (engine, clicks) = (self.engine, self.clicks);
        let parsed: Vec<Parsed> =
            chunk.par_iter().map(|(line, _)| parse_line(engine, clicks, line)).collect();
        let mut slates = Vec::with_capacity(parsed.len());
        for ((line, name), result) in chunk.iter().zip(parsed) {
            self.stats.lines += 1;
            match result {
                Parsed::NoClicks => self.stats.without_clicks += 1,
                Parsed::Invalid(_) if line.last && !line.complete => {
                    self.stats.partial_last_lines.push(format!("{name}:{}", line.file_line));
                }
                Parsed::Invalid(reason) => {
                    self.stats.invalid += 1;
                    if self.stats.first_invalid.len() < 5 {
                        self.stats.first_invalid.push((format!("{name}:{}", line.file_line), reason));
                    }
                }
                Parsed::Slate(mut slate) => {
                    slate.item = slate
                        .input
                        .ids()
                        .iter()
                        .map(|id| {
                            let next = u32::try_from(self.items.len()).unwrap_or(u32::MAX);
                            *self.items.entry(id.clone()).or_insert(next)
                        })
                        .collect();
                    self.stats.slates += 1;
                    self.stats.with_served += u64::from(slate.served_rank.is_some());
                    slates.push(*slate);
                }
            }
        }
        self.stats.items = self.items.len();
        Ok(Some(slates))
    }
}

/// One line's outcome.
enum Parsed {
    Slate(Box<Slate>),
    NoClicks,
    Invalid(String),
}

/// Whether a line may be an exposure-log record: it names a `"served"` key somewhere (the corpus
/// format has none; a corpus line that merely holds the word is decoded as corpus after the
/// exposure decode fails).
fn may_be_exposure(line: &[u8]) -> bool {
    line.windows(8).any(|w| w == b"\"served\"")
}

/// A line as an exposure record: the request, its clicks and the served ids.
fn decode_exposure(bytes: &[u8]) -> Result<(RerankRequest, Vec<String>, Vec<String>), String> {
    let ExposureLine { mut request, served, clicked } =
        wire::decode_json(bytes).map_err(|e| e.to_string())?;
    if wire::midpoint_seen() {
        #[derive(Deserialize)]
        struct Outer<'a> {
            #[serde(borrow)]
            request: &'a serde_json::value::RawValue,
        }
        if let Ok(outer) = serde_json::from_slice::<Outer<'_>>(bytes) {
            wire::exact_embeddings(&mut request.candidates, outer.request.get().as_bytes());
        }
    }
    if request.request_id.is_none() {
        request.request_id.clone_from(&served.request_id);
    }
    Ok((request, clicked, served.items))
}

/// One line into a validated slate, or why it is skipped.
fn parse_line(engine: &Engine, clicks: Option<&Clicks>, line: &RawLine) -> Parsed {
    let bytes = &line.bytes;
    let _ = wire::midpoint_seen();
    let exposure = if may_be_exposure(bytes) { decode_exposure(bytes).ok() } else { None };
    let (mut request, mut clicked, served) = match exposure {
        Some((request, clicked, served)) => (request, clicked, Some(served)),
        None => {
            let _ = wire::midpoint_seen();
            let logged: CorpusLine = match wire::decode_json(bytes) {
                Ok(l) => l,
                Err(e) => return Parsed::Invalid(e.to_string()),
            };
            let CorpusLine { mut request, clicked } = logged;
            if wire::midpoint_seen() {
                wire::exact_embeddings(&mut request.candidates, bytes);
            }
            (request, clicked, None)
        }
    };
    if let (Some(clicks), Some(id)) = (clicks, request.request_id.as_deref()) {
        if let Some(joined) = clicks.by_request.get(id) {
            clicked.extend(joined.iter().cloned());
        }
    }
    if clicked.is_empty() {
        return Parsed::NoClicks;
    }
    let key = request.request_id.as_deref().map_or_else(|| key_of_line(line.number), key_of_id);
    // Validate as a DPP request on the default slice of `engine` (which the caller builds
    // unlocked), so every slate has embeddings and every algorithm can run on it.
    request.slice = None;
    request.algorithm = Some("dpp".into());
    request.lambda = None;
    request.k = None;
    request.window = None;
    let input = match engine.prepare(request) {
        Ok(p) => p.input,
        Err(e) => return Parsed::Invalid(e.to_string()),
    };
    Parsed::Slate(Box::new(Slate::new(input, &clicked, served.as_deref(), key, line.number)))
}
