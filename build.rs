//! Generates the gRPC messages and service from `proto/medley/v1/reranker.proto`, with protox
//! (a protobuf compiler in Rust) instead of a system `protoc`, and writes the descriptor set the
//! reflection service serves.

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let proto = "proto/medley/v1/reranker.proto";
    println!("cargo:rerun-if-changed={proto}");
    let fds = protox::compile([proto], ["proto"])?;
    let out = std::path::PathBuf::from(std::env::var("OUT_DIR")?);
    std::fs::write(out.join("medley_descriptor.bin"), prost::Message::encode_to_vec(&fds))?;
    // Messages decode from one contiguous slice (src/grpc/codec.rs says why), and `Candidate` is
    // hand-written so that its packed embedding is read in one step (src/grpc/candidate.rs).
    tonic_prost_build::configure()
        .build_client(true)
        .build_server(true)
        .codec_path("crate::grpc::codec::SliceCodec")
        .extern_path(".medley.v1.Candidate", "crate::grpc::candidate::Candidate")
        .compile_fds(fds)?;
    Ok(())
}
