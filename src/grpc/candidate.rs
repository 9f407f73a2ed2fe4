//! `medley.v1.Candidate` with a hand-written [`prost::Message`]: the generated code (build.rs maps
//! the proto type here with `extern_path`) would read a packed `repeated float embedding` one
//! value at a time, each a `Vec::push` that grows the vector from empty, five allocations for
//! 64 values. Here a packed run is taken in one step: the vector is sized from the run's length
//! and filled from the bytes (`f32::from_le_bytes` over 4-byte chunks, a loop with no branch per
//! value). Every other field, and every other wire form, goes through prost's
//! own encoding functions, so the wire format is the generated code's exactly.
//!
//! Protobuf's rules for a `repeated float` field (protobuf.dev, "Encoding", packed repeated
//! fields) are kept: a parser accepts the packed form and the unpacked one (one 32-bit value per
//! key), and several packed runs of one field in a message concatenate.

use bytes::{Buf, BufMut};
use prost::encoding::{self, DecodeContext, WireType};
use prost::DecodeError;

/// One candidate of a `RerankRequest` (`reranker.proto`): the same fields, names and types the
/// generated struct would have.
#[derive(Clone, PartialEq, Default)]
pub struct Candidate {
    /// `string id = 1`.
    pub id: String,
    /// `double score = 2`.
    pub score: f64,
    /// `optional string category = 3`.
    pub category: Option<String>,
    /// `repeated float embedding = 4` (packed).
    pub embedding: Vec<f32>,
    /// `optional string group = 5`.
    pub group: Option<String>,
}

impl std::fmt::Debug for Candidate {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Candidate")
            .field("id", &self.id)
            .field("score", &self.score)
            .field("category", &self.category)
            .field("embedding", &format_args!("[{} values]", self.embedding.len()))
            .field("group", &self.group)
            .finish()
    }
}

/// Field numbers, as in `reranker.proto`.
const ID: u32 = 1;
const SCORE: u32 = 2;
const CATEGORY: u32 = 3;
const EMBEDDING: u32 = 4;
const GROUP: u32 = 5;

impl prost::Message for Candidate {
    fn encode_raw(&self, buf: &mut impl BufMut) {
        if !self.id.is_empty() {
            encoding::string::encode(ID, &self.id, buf);
        }
        if self.score != 0.0 {
            encoding::double::encode(SCORE, &self.score, buf);
        }
        if let Some(category) = &self.category {
            encoding::string::encode(CATEGORY, category, buf);
        }
        encoding::float::encode_packed(EMBEDDING, &self.embedding, buf);
        if let Some(group) = &self.group {
            encoding::string::encode(GROUP, group, buf);
        }
    }

    fn merge_field(
        &mut self,
        tag: u32,
        wire_type: WireType,
        buf: &mut impl Buf,
        ctx: DecodeContext,
    ) -> Result<(), DecodeError> {
        // Errors name the field as prost's derive names them ("Candidate.id: ...").
        let field = |name: &'static str| {
            move |mut error: DecodeError| {
                error.push("Candidate", name);
                error
            }
        };
        match tag {
            ID => encoding::string::merge(wire_type, &mut self.id, buf, ctx).map_err(field("id")),
            SCORE => encoding::double::merge(wire_type, &mut self.score, buf, ctx).map_err(field("score")),
            CATEGORY => {
                encoding::string::merge(wire_type, self.category.get_or_insert_with(String::new), buf, ctx)
                    .map_err(field("category"))
            }
            EMBEDDING
                if wire_type == WireType::LengthDelimited
                    && merge_packed_floats(&mut self.embedding, buf) =>
            {
                Ok(())
            }
            EMBEDDING => encoding::float::merge_repeated(wire_type, &mut self.embedding, buf, ctx)
                .map_err(field("embedding")),
            GROUP => encoding::string::merge(wire_type, self.group.get_or_insert_with(String::new), buf, ctx)
                .map_err(field("group")),
            _ => encoding::skip_field(wire_type, tag, buf, ctx),
        }
    }

    fn encoded_len(&self) -> usize {
        (if self.id.is_empty() { 0 } else { encoding::string::encoded_len(ID, &self.id) })
            + (if self.score == 0.0 { 0 } else { encoding::double::encoded_len(SCORE, &self.score) })
            + self.category.as_ref().map_or(0, |c| encoding::string::encoded_len(CATEGORY, c))
            + encoding::float::encoded_len_packed(EMBEDDING, &self.embedding)
            + self.group.as_ref().map_or(0, |g| encoding::string::encoded_len(GROUP, g))
    }

    fn clear(&mut self) {
        *self = Self::default();
    }
}

/// Appends one packed run of little-endian f32 values (the key already read): `length / 4`
/// values read straight from the buffer's contiguous chunks. `false`, with nothing read, when the
/// run's length cannot be read from the first chunk or the run is malformed (longer than the
/// buffer, or not a whole number of values); the caller then hands it to prost's own reader,
/// which reads it the generated code's way or returns the generated code's error.
fn merge_packed_floats(values: &mut Vec<f32>, buf: &mut impl Buf) -> bool {
    let first = buf.chunk();
    let mut peek = first;
    let Ok(len) = encoding::decode_varint(&mut peek) else { return false };
    let header = first.len() - peek.len();
    let Ok(len) = usize::try_from(len) else { return false };
    if len % 4 != 0 || header.saturating_add(len) > buf.remaining() {
        return false;
    }
    buf.advance(header);
    values.reserve_exact(len / 4);
    let mut left = len;
    while left > 0 {
        let chunk = buf.chunk();
        let whole = chunk.len().min(left) / 4 * 4;
        if whole == 0 {
            // A value split across two chunks of a non-contiguous buffer.
            values.push(buf.get_f32_le());
            left -= 4;
            continue;
        }
        values.extend(chunk[..whole].chunks_exact(4).map(|b| f32::from_le_bytes([b[0], b[1], b[2], b[3]])));
        buf.advance(whole);
        left -= whole;
    }
    true
}

/// prost's derive of the same fields (the form the code generator writes), the reference our
/// [`Candidate`] is checked against: by its unit tests, the `grpc` fuzz target and the
/// `grpc_decode` bench.
pub mod reference {
    /// `medley.v1.Candidate` as prost's derive reads and writes it; named as the generated
    /// struct is, so that its decode errors read the same ("Candidate.id: ...").
    #[derive(Clone, PartialEq, prost::Message)]
    pub struct Candidate {
        /// `string id = 1`.
        #[prost(string, tag = "1")]
        pub id: String,
        /// `double score = 2`.
        #[prost(double, tag = "2")]
        pub score: f64,
        /// `optional string category = 3`.
        #[prost(string, optional, tag = "3")]
        pub category: Option<String>,
        /// `repeated float embedding = 4` (packed).
        #[prost(float, repeated, tag = "4")]
        pub embedding: Vec<f32>,
        /// `optional string group = 5`.
        #[prost(string, optional, tag = "5")]
        pub group: Option<String>,
    }

    /// A candidate's fields with its floats as bits, so that two readings compare exactly (NaNs
    /// included).
    pub type Key = (String, u64, Option<String>, Option<String>, Vec<u32>);

    /// The [`Key`] of a candidate's fields, whichever struct holds them.
    #[must_use]
    pub fn key(
        id: &str,
        score: f64,
        category: &Option<String>,
        group: &Option<String>,
        embedding: &[f32],
    ) -> Key {
        (
            id.to_owned(),
            score.to_bits(),
            category.clone(),
            group.clone(),
            embedding.iter().map(|x| x.to_bits()).collect(),
        )
    }

    /// `medley.v1.RerankRequest`'s candidates alone (its other fields are skipped as unknown).
    #[derive(Clone, PartialEq, prost::Message)]
    pub struct RerankRequest {
        /// `repeated Candidate candidates = 7`.
        #[prost(message, repeated, tag = "7")]
        pub candidates: Vec<Candidate>,
    }
}

#[cfg(test)]
mod tests {
    //! The reference is prost's derive (prost-derive, the code generator's own output form) on a
    //! struct with the same field numbers: our encoding must equal its bytes, and its bytes in
    //! every wire form must decode to the same values.
    use super::Candidate;
    use crate::testing::Rng;
    use bytes::Buf;
    use prost::Message;

    use super::reference::{key, Candidate as Derived};

    /// The same fields with the embedding written unpacked (one key per value), which a proto3
    /// parser must accept.
    #[derive(Clone, PartialEq, prost::Message)]
    struct Unpacked {
        #[prost(string, tag = "1")]
        id: String,
        #[prost(double, tag = "2")]
        score: f64,
        #[prost(string, optional, tag = "3")]
        category: Option<String>,
        #[prost(float, repeated, packed = "false", tag = "4")]
        embedding: Vec<f32>,
        #[prost(string, optional, tag = "5")]
        group: Option<String>,
        /// A field this version does not know, to be skipped.
        #[prost(uint64, tag = "99")]
        unknown: u64,
    }

    fn random(rng: &mut Rng) -> Derived {
        let text = |rng: &mut Rng| {
            (0..rng.next() % 12).map(|_| char::from(b'a' + (rng.next() % 26) as u8)).collect()
        };
        let maybe = |rng: &mut Rng| (!rng.next().is_multiple_of(3)).then(|| text(rng));
        Derived {
            id: text(rng),
            score: if rng.next().is_multiple_of(5) { 0.0 } else { f64::from_bits(rng.next()) },
            category: maybe(rng),
            // Any bit pattern, NaNs and infinities included: the wire keeps bits.
            embedding: (0..rng.next() % 70).map(|_| f32::from_bits(rng.next() as u32)).collect(),
            group: maybe(rng),
        }
    }

    fn same(ours: &Candidate, derived: &Derived) {
        assert_eq!(
            key(&ours.id, ours.score, &ours.category, &ours.group, &ours.embedding),
            key(&derived.id, derived.score, &derived.category, &derived.group, &derived.embedding)
        );
    }

    #[test]
    fn the_wire_is_prost_deriveds_in_every_form() {
        let mut rng = Rng(0x5EED);
        for _ in 0..2_000 {
            let derived = random(&mut rng);
            let packed = derived.encode_to_vec();
            let ours = Candidate::decode(packed.as_slice()).unwrap();
            same(&ours, &derived);
            // Our encoding: the same bytes and the same length.
            assert_eq!(ours.encode_to_vec(), packed);
            assert_eq!(ours.encoded_len(), packed.len());
            // Unpacked values and an unknown field.
            let unpacked = Unpacked {
                id: derived.id.clone(),
                score: derived.score,
                category: derived.category.clone(),
                embedding: derived.embedding.clone(),
                group: derived.group.clone(),
                unknown: rng.next(),
            };
            same(&Candidate::decode(unpacked.encode_to_vec().as_slice()).unwrap(), &derived);
            // The message split over many small chunks (a non-contiguous buffer): values that
            // straddle two chunks.
            let mut chained: Box<dyn Buf> = Box::new(bytes::Bytes::new());
            for piece in packed.chunks(3) {
                chained = Box::new(chained.chain(bytes::Bytes::copy_from_slice(piece)));
            }
            same(&Candidate::decode(chained).unwrap(), &derived);
        }
    }

    #[test]
    fn two_packed_runs_concatenate_and_a_bad_run_is_refused() {
        let a = Derived { embedding: vec![1.0, 2.0], ..Derived::default() };
        let b = Derived { embedding: vec![3.0], ..Derived::default() };
        let mut both = a.encode_to_vec();
        both.extend(b.encode_to_vec());
        assert_eq!(Candidate::decode(both.as_slice()).unwrap().embedding, vec![1.0, 2.0, 3.0]);
        assert_eq!(Derived::decode(both.as_slice()).unwrap().embedding, vec![1.0, 2.0, 3.0]);
        // Key 4, wire type 2, length 6: not whole values; a length past the end; a truncated
        // length; an id (key 1) that is not UTF-8; a score (key 2) with a string's wire type.
        // Refused with the derive's own message, which names the field.
        for bad in [
            vec![0x22, 6, 0, 0, 128, 63, 0, 0],
            vec![0x22, 12, 0, 0, 128, 63],
            vec![0x22, 0x80],
            vec![0x0a, 2, 0xff, 0xfe],
            vec![0x12, 1, 0],
        ] {
            let ours = Candidate::decode(bad.as_slice()).expect_err("refused");
            let theirs = Derived::decode(bad.as_slice()).expect_err("refused");
            assert_eq!(ours.to_string(), theirs.to_string(), "{bad:?}");
        }
    }
}
