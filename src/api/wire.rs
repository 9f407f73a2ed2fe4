//! The JSON wire format: request and response DTOs and the error body, shared by the HTTP
//! endpoints and the batch subcommand (which is why it lives beside them rather than under
//! `http/`).
//!
//! DTOs are plain serde structs that mirror the documented JSON (docs/openapi.json). Nothing here
//! validates values; `serve::engine::Engine::prepare` turns a [`RerankRequest`] into the
//! validated types the kernels trust. Decoding takes the fast path (`simd-json`, a SIMD parser)
//! and, only when that fails, decodes again with `serde_json` and `serde_path_to_error` to name
//! the field at fault, so every error code, message and path is serde_json's. Unknown fields are
//! accepted and ignored, so callers can add fields before we read them.
//!
//! Numbers: scores are f64 parsed with correct rounding (simd-json's precise parser, and
//! serde_json's `float_roundtrip`), so they round-trip bit for bit. Embedding values are f32,
//! and a parser that produces f64 first can round twice: decimal → f64 → f32 differs from a
//! correctly rounded decimal → f32 exactly when the f64 lands on a midpoint between two f32
//! values (and the decimal was not that midpoint). Every f64 to f32 step here checks for that
//! midpoint ([`f32_of`]); a request that hits one (about one number in 2²⁹ of random text)
//! has its embeddings parsed again from their text with `str::parse::<f32>`.

use serde::{Deserialize, Serialize};

use super::RequestError;

/// One re-rank request. Serialising it gives the JSON body that decodes to it (the exposure log
/// writes a gRPC request that way); absent fields stay absent.
#[derive(Debug, Clone, Default, PartialEq, Deserialize, Serialize)]
pub struct RerankRequest {
    /// Echoed back in the response.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub request_id: Option<String>,
    /// Traffic slice; absent means `"default"`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub slice: Option<String>,
    /// Slate length; absent means the slice's.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub k: Option<u64>,
    /// Diversifier name; absent means the slice's.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub algorithm: Option<String>,
    /// Diversity weight; absent means the slice's.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub lambda: Option<f64>,
    /// A user or session id; the same unit always lands in the same arm of a slice.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub unit_id: Option<String>,
    /// Sliding window of `dpp` and `ssd` (2..=1000): compare with the last `window − 1` picks.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub window: Option<u64>,
    /// The user's taste profile: category → non-negative weight (normalised to sum 1). Required
    /// by `calibrated`; with any algorithm it adds `diversity.miscalibration` to the answer.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub profile: Option<std::collections::BTreeMap<String, f64>>,
    /// A fairness floor over the candidates' `group` (Zehlike et al. 2017).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub fairness: Option<WireFairness>,
    /// The scored candidates, each a JSON object.
    #[serde(deserialize_with = "objects")]
    pub candidates: Vec<WireCandidate>,
}

/// A candidate that must arrive as a JSON object. serde's derived structs also accept an array
/// of the fields in order (`["a", 0.5]`); the wire contract has named fields only.
struct CandidateObject(WireCandidate);

impl<'de> Deserialize<'de> for CandidateObject {
    fn deserialize<D: serde::Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        struct Object;
        impl<'de> serde::de::Visitor<'de> for Object {
            type Value = WireCandidate;
            fn expecting(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.write_str("a candidate object, {\"id\": ..., \"score\": ...}")
            }
            fn visit_map<A: serde::de::MapAccess<'de>>(self, map: A) -> Result<WireCandidate, A::Error> {
                WireCandidate::deserialize(serde::de::value::MapAccessDeserializer::new(map))
            }
        }
        deserializer.deserialize_map(Object).map(CandidateObject)
    }
}

/// `candidates`: an array of objects.
fn objects<'de, D: serde::Deserializer<'de>>(deserializer: D) -> Result<Vec<WireCandidate>, D::Error> {
    let wrapped = Vec::<CandidateObject>::deserialize(deserializer)?;
    Ok(wrapped.into_iter().map(|c| c.0).collect())
}

/// `embedding`: null or an array of numbers, each taken to the nearest f32.
fn f32_array<'de, D: serde::Deserializer<'de>>(deserializer: D) -> Result<Option<Vec<f32>>, D::Error> {
    struct Array;
    impl<'de> serde::de::Visitor<'de> for Array {
        type Value = Vec<f32>;
        fn expecting(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
            f.write_str("a sequence")
        }
        fn visit_seq<A: serde::de::SeqAccess<'de>>(self, mut seq: A) -> Result<Vec<f32>, A::Error> {
            let mut out = Vec::with_capacity(seq.size_hint().unwrap_or(0).min(4096));
            while let Some(F32(v)) = seq.next_element()? {
                out.push(v);
            }
            Ok(out)
        }
    }
    struct Values(Vec<f32>);
    impl<'de> Deserialize<'de> for Values {
        fn deserialize<D: serde::Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
            deserializer.deserialize_seq(Array).map(Values)
        }
    }
    Ok(Option::<Values>::deserialize(deserializer)?.map(|v| v.0))
}

/// One embedding value: the number as f64 (as both parsers give it), then to the nearest f32.
struct F32(f32);

impl<'de> Deserialize<'de> for F32 {
    fn deserialize<D: serde::Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        struct Number;
        impl serde::de::Visitor<'_> for Number {
            type Value = F32;
            // serde's own f32 says "f32", which the error path turns into "a number".
            fn expecting(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.write_str("f32")
            }
            fn visit_f64<E: serde::de::Error>(self, v: f64) -> Result<F32, E> {
                f32_of(v).map(F32).ok_or_else(|| E::custom("number out of range"))
            }
            fn visit_f32<E: serde::de::Error>(self, v: f32) -> Result<F32, E> {
                Ok(F32(v))
            }
            // An integer converts with one rounding (`as` rounds to nearest, ties to even).
            fn visit_i64<E: serde::de::Error>(self, v: i64) -> Result<F32, E> {
                Ok(F32(v as f32))
            }
            fn visit_u64<E: serde::de::Error>(self, v: u64) -> Result<F32, E> {
                Ok(F32(v as f32))
            }
        }
        deserializer.deserialize_f64(Number)
    }
}

thread_local! {
    /// Set when a decode on this thread took an f64 that lies exactly on an f32 midpoint.
    static MIDPOINT: std::cell::Cell<bool> = const { std::cell::Cell::new(false) };
}

/// The f32 nearest to the decimal that parsed to `v`, given `v` is that decimal correctly
/// rounded to f64; `None` when it overflows f32. When `v` is exactly halfway between two f32
/// values the decimal may have been on either side, so the thread's midpoint flag is raised
/// (and the caller re-parses from the text); the value returned then is `v as f32`.
#[must_use]
#[allow(clippy::float_cmp, reason = "exact comparisons are the point: a midpoint is exact")]
pub fn f32_of(v: f64) -> Option<f32> {
    // `as` rounds to nearest, ties to even, and overflows to infinity.
    let x = v as f32;
    if x.is_infinite() {
        return None;
    }
    let below = f64::from(x);
    if below != v {
        // The f32 on the other side of v from x; v is a midpoint iff it is halfway to it.
        let other = if v > below { x.next_up() } else { x.next_down() };
        if (f64::from(other) - v) == (v - below) {
            MIDPOINT.set(true);
        }
    }
    Some(x)
}

/// One candidate on the wire.
#[derive(Debug, Clone, Default, PartialEq, Deserialize, Serialize)]
pub struct WireCandidate {
    /// Caller's item id.
    pub id: String,
    /// Caller's score.
    pub score: f64,
    /// Optional category.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub category: Option<String>,
    /// Embedding as a JSON array.
    #[serde(default, deserialize_with = "f32_array", skip_serializing_if = "Option::is_none")]
    pub embedding: Option<Vec<f32>>,
    /// Embedding as standard base64 of little-endian f32 values.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub embedding_b64: Option<String>,
    /// The provider group a fairness floor counts (`fairness.protected` names one).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub group: Option<String>,
}

/// `fairness`: every prefix of the slate holds at least the share `share` of candidates whose
/// `group` is `protected`, tested at significance `alpha`.
#[derive(Debug, Clone, Default, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct WireFairness {
    /// The protected group's name.
    pub protected: String,
    /// Target share, in (0, 1).
    pub share: f64,
    /// Significance of each prefix's test, in (0, 1).
    pub alpha: f64,
}

/// The response to one request.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RerankResponse {
    /// The request's `request_id`; when it had none and the exposure log recorded it, the
    /// UUID v7 the log assigned.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub request_id: Option<String>,
    /// Slice that served the request.
    pub slice: String,
    /// Arm of the slice that served it (`"default"` for a slice without arms).
    pub arm: String,
    /// Generation of the config that served it.
    pub config_generation: u64,
    /// Diversifier used.
    pub algorithm: &'static str,
    /// Lambda used.
    pub lambda: f64,
    /// k requested (the slate has min(k, N) items).
    pub k: u64,
    /// The slate, in order.
    pub items: Vec<Item>,
    /// True when the fairness floor could not be met at some prefix (too few protected
    /// candidates); absent otherwise.
    #[serde(skip_serializing_if = "std::ops::Not::not")]
    pub fairness_shortfall: bool,
    /// Version of the item catalog that served the request (`"{rows}-{digest}"`); absent when no
    /// catalog is configured.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub catalog_version: Option<String>,
    /// Candidates left out because the catalog does not know them (`unknown_items = "drop"`);
    /// present whenever that policy and a catalog served the request, absent otherwise.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub dropped: Option<u64>,
    /// How diverse the slate is.
    pub diversity: Diversity,
}

/// One slate entry, with the caller's original score.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Item {
    /// Caller's id.
    pub id: String,
    /// Caller's score, unchanged.
    pub score: f64,
    /// Caller's category, when it sent one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub category: Option<String>,
}

/// Diversity of one slate.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Diversity {
    /// Shannon entropy of the slate's categories, in bits (uncategorised items are one group).
    pub category_entropy_bits: f64,
    /// Number of distinct categories in the slate.
    pub distinct_categories: usize,
    /// Mean pairwise cosine distance (0 for fewer than two items); null without embeddings.
    pub intra_list_distance: Option<f64>,
    /// `KL(p ‖ q̃)` of the slate's categories from the request's profile (Steck 2018, α = 0.01),
    /// in nats; absent without a profile.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub miscalibration: Option<f64>,
    /// Share of protected items in the slate, when the request has a fairness floor.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub protected_share: Option<f64>,
}

/// Every non-2xx body: `{"error": {...}}`, plus `"line"` on stream and batch lines.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ErrorBody {
    /// The error.
    pub error: ErrorDetail,
    /// 1-based input line, on the stream endpoint and in batch output.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub line: Option<u64>,
}

/// The error object.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ErrorDetail {
    /// Stable snake_case code callers can branch on.
    pub code: &'static str,
    /// A sentence a caller can act on.
    pub message: String,
    /// JSON path of the field at fault (`candidates[3].embedding`), when one field is.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub path: Option<String>,
}

impl ErrorBody {
    /// A body with no line number.
    #[must_use]
    pub fn new(code: &'static str, message: impl Into<String>, path: Option<String>) -> Self {
        Self { error: ErrorDetail { code, message: message.into(), path }, line: None }
    }

    /// The body of a request error.
    #[must_use]
    pub fn from_request_error(e: &RequestError) -> Self {
        Self::new(e.code(), e.to_string(), e.path())
    }

    /// Sets the 1-based line number.
    #[must_use]
    pub fn at_line(mut self, line: u64) -> Self {
        self.line = Some(line);
        self
    }

    /// The body serialised; infallible for this type.
    #[must_use]
    pub fn to_json(&self) -> Vec<u8> {
        serde_json::to_vec(self)
            .unwrap_or_else(|_| br#"{"error":{"code":"internal","message":"internal error"}}"#.to_vec())
    }
}

/// Decodes one request from JSON bytes.
///
/// # Errors
/// [`RequestError::MalformedJson`] for text that is not JSON, [`RequestError::InvalidField`]
/// (with the field's path) for JSON of the wrong shape.
pub fn decode_request(bytes: &[u8]) -> Result<RerankRequest, RequestError> {
    // serde's derived structs also accept a JSON array of the fields in order; a request is an
    // object, so any other well-formed JSON is refused before decoding (skipping it with
    // IgnoredAny is iterative, so even deep nesting costs no stack).
    if bytes.iter().find(|b| !b.is_ascii_whitespace()).is_some_and(|&b| b != b'{')
        && serde_json::from_slice::<serde::de::IgnoredAny>(bytes).is_ok()
    {
        return Err(RequestError::InvalidField {
            message: "a request is a JSON object: {\"candidates\": [...], ...}".to_owned(),
            path: None,
        });
    }
    let _ = midpoint_seen();
    let mut request: RerankRequest = decode_json(bytes)?;
    if midpoint_seen() {
        exact_embeddings(&mut request.candidates, bytes);
    }
    Ok(request)
}

/// Decodes any JSON body the same way: the fast path, then serde_json naming the field at
/// fault (admin bodies and replay lines too). Embedding values may carry a double rounding
/// (module notes); [`decode_request`] and [`exact_embeddings`] undo it.
///
/// # Errors
/// As [`decode_request`].
pub fn decode_json<T: serde::de::DeserializeOwned>(bytes: &[u8]) -> Result<T, RequestError> {
    match fast(bytes) {
        Some(r) => Ok(r),
        None => named(bytes),
    }
}

/// Whether an embedding value decoded on this thread since the last call lay on an f32
/// midpoint (then [`exact_embeddings`] must re-parse them); clears the flag.
#[must_use]
pub fn midpoint_seen() -> bool {
    MIDPOINT.replace(false)
}

/// Re-parses the embeddings of `candidates` from `request_json`, the text of the request
/// object they were decoded from, each value with `str::parse::<f32>` (correctly rounded). The
/// shapes agree, having decoded from the same text; anything else leaves values as they were.
pub fn exact_embeddings(candidates: &mut [WireCandidate], request_json: &[u8]) {
    /// What the exact re-parse reads of a request: each candidate's `embedding` as raw text.
    #[derive(Deserialize)]
    struct RawRequest<'a> {
        #[serde(borrow)]
        candidates: Vec<RawCandidate<'a>>,
    }
    #[derive(Deserialize)]
    struct RawCandidate<'a> {
        #[serde(default, borrow)]
        embedding: Option<&'a serde_json::value::RawValue>,
    }
    let Ok(raw) = serde_json::from_slice::<RawRequest<'_>>(request_json) else { return };
    for (c, r) in candidates.iter_mut().zip(raw.candidates) {
        let (Some(values), Some(text)) = (c.embedding.as_mut(), r.embedding) else { continue };
        let text = text.get().trim();
        let inner = text.strip_prefix('[').and_then(|t| t.strip_suffix(']')).unwrap_or("");
        for (v, t) in values.iter_mut().zip(inner.split(',')) {
            if let Ok(x) = t.trim().parse::<f32>() {
                *v = x;
            }
        }
    }
}

/// The fast path: simd-json over a copy of the bytes (it parses in place), with its buffers
/// kept per thread. `None` on any failure, which the named path then explains.
fn fast<T: serde::de::DeserializeOwned>(bytes: &[u8]) -> Option<T> {
    thread_local! {
        static SCRATCH: std::cell::RefCell<(Vec<u8>, simd_json::Buffers)> =
            std::cell::RefCell::new((Vec::new(), simd_json::Buffers::default()));
    }
    SCRATCH.with_borrow_mut(|(copy, buffers)| {
        copy.clear();
        copy.extend_from_slice(bytes);
        let out = simd_json::serde::from_slice_with_buffers(copy, buffers).ok();
        // Keep at most 1 MiB between calls: one large body must not pin its copy.
        if copy.capacity() > 1 << 20 {
            *copy = Vec::new();
            *buffers = simd_json::Buffers::default();
        }
        out
    })
}

/// The named path: serde_json, and serde_path_to_error for the field at fault.
fn named<T: serde::de::DeserializeOwned>(bytes: &[u8]) -> Result<T, RequestError> {
    match serde_json::from_slice(bytes) {
        Ok(r) => Ok(r),
        Err(_) => {
            let de = &mut serde_json::Deserializer::from_slice(bytes);
            let err = match serde_path_to_error::deserialize::<_, T>(de) {
                // Unreachable in practice: both paths decode the same type.
                Ok(r) => return Ok(r),
                Err(e) => e,
            };
            let path = err.path().to_string();
            let inner = err.into_inner();
            // serde names Rust types; callers think in JSON types.
            let message = inner
                .to_string()
                .replace("expected f64", "expected a number")
                .replace("expected f32", "expected a number")
                .replace("expected u64", "expected a whole number >= 0");
            let path = (path != "." && !path.is_empty()).then_some(path);
            // A number too large for its field (1e400 as a score, 1e39 as an f32) is reported by
            // serde_json as a syntax error; it is a field problem, so it keeps its path.
            let out_of_range = message.starts_with("number out of range");
            Err(match inner.classify() {
                serde_json::error::Category::Data => RequestError::InvalidField { message, path },
                _ if out_of_range => RequestError::InvalidField { message, path },
                _ => RequestError::MalformedJson { message },
            })
        }
    }
}

/// Decodes `embedding_b64`: standard base64 (with padding) of little-endian f32 values.
///
/// # Errors
/// A reason string when the text is not base64 or its byte length is not a multiple of 4.
pub fn decode_b64_embedding(text: &str) -> Result<Vec<f32>, String> {
    use base64::Engine as _;
    thread_local! {
        // Decoded bytes of the current embedding; reused so each candidate allocates only its f32s.
        static BYTES: std::cell::RefCell<Vec<u8>> = const { std::cell::RefCell::new(Vec::new()) };
    }
    BYTES.with_borrow_mut(|bytes| {
        bytes.clear();
        base64::engine::general_purpose::STANDARD
            .decode_vec(text, bytes)
            .map_err(|e| format!("is not standard base64: {e}"))?;
        if bytes.len() % 4 != 0 {
            return Err(format!(
                "decodes to {} bytes, which is not a whole number of f32 values (4 bytes each)",
                bytes.len()
            ));
        }
        Ok(bytes.chunks_exact(4).map(|b| f32::from_le_bytes([b[0], b[1], b[2], b[3]])).collect())
    })
}

/// Encodes an embedding as `embedding_b64` (for clients and tests).
#[must_use]
pub fn encode_b64_embedding(values: &[f32]) -> String {
    use base64::Engine as _;
    let bytes: Vec<u8> = values.iter().flat_map(|v| v.to_le_bytes()).collect();
    base64::engine::general_purpose::STANDARD.encode(bytes)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::testing::Rng;

    /// A request whose first candidate's embedding is the given texts, verbatim.
    fn request_with(values: &[String], score: &str) -> Vec<u8> {
        format!(r#"{{"candidates":[{{"id":"a","score":{score},"embedding":[{}]}}]}}"#, values.join(", "))
            .into_bytes()
    }

    /// Each embedding value equals Rust's correctly rounded `str::parse::<f32>` of its text (the
    /// reference outside this module: core's decimal-to-float conversion), on random decimals of
    /// 1 to 30 significant digits across the f32 exponent range, on random f32 values printed
    /// shortest and with 9 and 17 digits, and on hand-made edge cases: exact midpoints between
    /// neighbouring f32 values (ties to even), decimals a hair above and below them (where a
    /// decimal → f64 → f32 parse rounds twice and goes wrong), subnormals, and the largest f32.
    #[test]
    fn embedding_values_are_the_correctly_rounded_f32_of_their_text() {
        let mut rng = Rng(0x00F3_2F32);
        let mut texts: Vec<String> = vec![
            // 1 + 2^-24, the midpoint between 1 and its successor: ties to even (1).
            "1.000000059604644775390625".into(),
            // A hair above and below that midpoint: f64 rounds both onto it.
            "1.0000000596046447753906250000001".into(),
            "1.0000000596046447753906249999999".into(),
            // 1 + 3·2^-24, between 1 + 2^-23 and 1 + 2^-22: ties to even goes up.
            "1.000000178813934326171875".into(),
            "1.0000001788139343261718749999999".into(),
            "1.0000001788139343261718750000001".into(),
            "-0.50000002980232238769531250000001".into(),
            "1e-45".into(),
            "7e-46".into(),
            "1.4e-45".into(),
            "7.006492321624085354618647916449580656401309709382578858785341e-46".into(),
            "1.1754942e-38".into(),
            "3.4028235e38".into(),
            "3.40282356e38".into(),
            "0".into(),
            "-0.0".into(),
            "12345678".into(),
            "16777217".into(),
        ];
        for _ in 0..4000 {
            let digits = 1 + (rng.next() % 30) as usize;
            let mantissa: String = (0..digits).map(|_| char::from(b'0' + (rng.next() % 10) as u8)).collect();
            let exp = (rng.next() % 80) as i32 - 50;
            let sign = if rng.next().is_multiple_of(2) { "" } else { "-" };
            texts.push(format!("{sign}0.{mantissa}e{exp}"));
        }
        for _ in 0..4000 {
            let x = f32::from_bits(rng.next() as u32);
            if x.is_finite() {
                texts.push(format!("{x:?}"));
                texts.push(format!("{x:.8e}"));
                texts.push(format!("{:.16e}", f64::from(x) * (1.0 + 1e-12)));
            }
        }
        // Out of f32's range is an error of its own (tested with the error paths).
        texts.retain(|t| t.parse::<f32>().is_ok_and(f32::is_finite));
        for chunk in texts.chunks(64) {
            let chunk: Vec<String> = chunk.to_vec();
            let request = decode_request(&request_with(&chunk, "0.5")).unwrap();
            let got = request.candidates[0].embedding.as_ref().unwrap();
            for (t, g) in chunk.iter().zip(got) {
                let want: f32 = t.parse().unwrap();
                assert_eq!(g.to_bits(), want.to_bits(), "{t}: got {g:e}, want {want:e}");
            }
        }
    }

    /// The fast path decodes an ordinary request (the named path is for failures only), and the
    /// double rounding the midpoint check guards against is real: through f64, a decimal just
    /// above the midpoint between 1 and its f32 successor comes back as 1.
    #[test]
    fn the_fast_path_takes_valid_requests_and_double_rounding_is_real() {
        let body = br#"{"k":2,"lambda":0.5,"candidates":[{"id":"a","score":1,"category":"c","embedding":[0.5,1e-3]}]}"#;
        let fast: RerankRequest = fast(body).expect("simd-json decodes a valid request");
        assert_eq!(fast, named::<RerankRequest>(body).unwrap());
        let text = "1.0000000596046447753906250000001";
        let twice = text.parse::<f64>().unwrap() as f32;
        assert_eq!(twice.to_bits(), 1.0_f32.to_bits());
        assert_eq!(text.parse::<f32>().unwrap().to_bits(), 1.0_f32.next_up().to_bits());
        let request = decode_request(&request_with(&[text.to_owned()], "1")).unwrap();
        assert_eq!(request.candidates[0].embedding.as_deref(), Some(&[1.0_f32.next_up()][..]));
    }

    /// Scores round-trip bit for bit: random f64 values printed shortest (what serde_json and
    /// most clients write) and with 17 significant digits, and random decimals, each equal to
    /// `str::parse::<f64>` of its text.
    #[test]
    fn scores_are_the_correctly_rounded_f64_of_their_text() {
        let mut rng = Rng(0x5C0E);
        let mut texts = vec![
            "0.1".to_owned(),
            "2.2250738585072014e-308".into(),
            "4.9e-324".into(),
            "1.7976931348623157e308".into(),
        ];
        for _ in 0..3000 {
            let x = f64::from_bits(rng.next());
            if x.is_finite() {
                texts.push(format!("{x:?}"));
                texts.push(format!("{x:.16e}"));
            }
            let digits = 1 + (rng.next() % 25) as usize;
            let mantissa: String = (0..digits).map(|_| char::from(b'0' + (rng.next() % 10) as u8)).collect();
            texts.push(format!("1{mantissa}e{}", (rng.next() % 600) as i32 - 300));
        }
        texts.retain(|t| t.parse::<f64>().is_ok_and(f64::is_finite));
        for t in texts {
            let request = decode_request(&request_with(&[], &t)).unwrap();
            let want: f64 = t.parse().unwrap();
            assert_eq!(request.candidates[0].score.to_bits(), want.to_bits(), "{t}");
        }
    }

    #[test]
    fn wrong_types_name_their_path() {
        let e = decode_request(br#"{"candidates":[{"id":"a","score":1},{"id":"b","score":"high"}]}"#)
            .unwrap_err();
        assert_eq!(e.code(), "invalid_field");
        assert_eq!(e.path().as_deref(), Some("candidates[1].score"));
        assert!(e.to_string().contains("expected a number"), "{e}");
        let e = decode_request(br#"{"k": 2.5, "candidates": []}"#).unwrap_err();
        assert_eq!(e.path().as_deref(), Some("k"));
        let e = decode_request(br#"{"candidates": [], "k": 1, "k": 2}"#).unwrap_err();
        assert!(e.to_string().contains("duplicate field `k`"), "{e}");
        let e = decode_request(br#"{"candidates":[{"id":"a","score":1e400}]}"#).unwrap_err();
        assert_eq!((e.code(), e.path().as_deref()), ("invalid_field", Some("candidates[0].score")));
        // A candidate is an object: serde's positional form of a struct is refused.
        let e = decode_request(br#"{"candidates":[{"id":"a","score":1},["b",0.5]]}"#).unwrap_err();
        assert_eq!((e.code(), e.path().as_deref()), ("invalid_field", Some("candidates[1]")));
        assert!(e.to_string().contains("expected a candidate object"), "{e}");
        // Paths inside an object candidate are still named.
        let e = decode_request(br#"{"candidates":[{"id":"a","score":1,"embedding":[1,"x"]}]}"#).unwrap_err();
        assert_eq!(e.path().as_deref(), Some("candidates[0].embedding[1]"));
        let e = decode_request(br#"{"candidates":[{"id":"a","score":1,"embedding":[1e39]}]}"#).unwrap_err();
        assert_eq!((e.code(), e.path().as_deref()), ("invalid_field", Some("candidates[0].embedding[0]")));
        let e = decode_request(b"{}").unwrap_err();
        assert!(e.to_string().contains("missing field `candidates`"), "{e}");
    }

    #[test]
    fn syntax_errors_are_malformed_json() {
        for body in [&b""[..], b"{", b"nul", b"{\"candidates\": [}", b"\xff\xfe"] {
            let e = decode_request(body).unwrap_err();
            assert_eq!(e.code(), "malformed_json", "{body:?}: {e}");
        }
        for body in [&b"null"[..], b"[]", b"3"] {
            assert_eq!(decode_request(body).unwrap_err().code(), "invalid_field", "{body:?}");
        }
    }

    #[test]
    fn unknown_fields_are_ignored() {
        let r =
            decode_request(br#"{"candidates": [{"id":"a","score":1,"colour":"red"}], "extra": {"x": [1]}}"#)
                .unwrap();
        assert_eq!(r.candidates.len(), 1);
    }

    #[test]
    fn base64_round_trips_little_endian_f32() {
        let v = [0.25_f32, -1.5, 3.0e-8, f32::MAX];
        assert_eq!(decode_b64_embedding(&encode_b64_embedding(&v)).unwrap(), v);
        // 1.0f32 little-endian is 00 00 80 3f: base64 "AACAPw==" (worked by hand from RFC 4648).
        assert_eq!(decode_b64_embedding("AACAPw==").unwrap(), [1.0]);
        assert!(decode_b64_embedding("AACA").unwrap_err().contains("3 bytes"));
        assert!(decode_b64_embedding("!!!").unwrap_err().contains("base64"));
    }
}
