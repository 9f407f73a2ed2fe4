//! Arbitrary bytes as a `medley.v1.RerankRequest` gRPC message: decode (checked against prost's
//! derive), validate, serve.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| medley::fuzz::grpc_decode_and_serve(data));
