//! Arbitrary bytes as a `POST /v1/rerank` body: decode, validate, serve, encode.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| medley::fuzz::decode_and_serve(data));
