//! The JSON wire format: request and response DTOs and the error body, shared by the HTTP
//! endpoints and the batch subcommand (which is why it lives beside them rather than under
//! `http/`).
//!
//! DTOs are plain serde structs that mirror the documented JSON (docs/openapi.json). Nothing here
//! validates values; `serve::engine::Engine::prepare` turns a [`RerankRequest`] into the
//! validated types the kernels trust. Decoding takes the fast path (plain `serde_json`) and, only
//! when that fails, decodes again with `serde_path_to_error` to name the field at fault.
//! Unknown fields are accepted and ignored, so callers can add fields before we read them.

use serde::{Deserialize, Serialize};

use super::RequestError;

/// One re-rank request.
#[derive(Debug, Clone, Default, PartialEq, Deserialize)]
pub struct RerankRequest {
    /// Echoed back in the response.
    #[serde(default)]
    pub request_id: Option<String>,
    /// Traffic slice; absent means `"default"`.
    #[serde(default)]
    pub slice: Option<String>,
    /// Slate length; absent means the slice's.
    #[serde(default)]
    pub k: Option<u64>,
    /// Diversifier name; absent means the slice's.
    #[serde(default)]
    pub algorithm: Option<String>,
    /// Diversity weight; absent means the slice's.
    #[serde(default)]
    pub lambda: Option<f64>,
    /// A user or session id; the same unit always lands in the same arm of a slice.
    #[serde(default)]
    pub unit_id: Option<String>,
    /// Sliding window of `dpp` and `ssd` (2..=1000): compare with the last `window − 1` picks.
    #[serde(default)]
    pub window: Option<u64>,
    /// The user's taste profile: category → non-negative weight (normalised to sum 1). Required
    /// by `calibrated`; with any algorithm it adds `diversity.miscalibration` to the answer.
    #[serde(default)]
    pub profile: Option<std::collections::BTreeMap<String, f64>>,
    /// A fairness floor over the candidates' `group` (Zehlike et al. 2017).
    #[serde(default)]
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

/// One candidate on the wire.
#[derive(Debug, Clone, Default, PartialEq, Deserialize)]
pub struct WireCandidate {
    /// Caller's item id.
    pub id: String,
    /// Caller's score.
    pub score: f64,
    /// Optional category.
    #[serde(default)]
    pub category: Option<String>,
    /// Embedding as a JSON array.
    #[serde(default)]
    pub embedding: Option<Vec<f32>>,
    /// Embedding as standard base64 of little-endian f32 values.
    #[serde(default)]
    pub embedding_b64: Option<String>,
    /// The provider group a fairness floor counts (`fairness.protected` names one).
    #[serde(default)]
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
    /// The request's `request_id`, when it had one.
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
    decode_json(bytes)
}

/// Decodes any JSON body the same way (used for admin bodies too).
///
/// # Errors
/// As [`decode_request`].
pub fn decode_json<T: serde::de::DeserializeOwned>(bytes: &[u8]) -> Result<T, RequestError> {
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
