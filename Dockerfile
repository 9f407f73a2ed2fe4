# Multi-stage build of the medley service.
#   docker build -t medley .
#   docker run -p 8080:8080 -p 8082:8082 medley         # embedded default config; HTTP and gRPC
#   docker run -p 8080:8080 -v $PWD/config:/etc/medley:ro medley \
#       serve --config /etc/medley/example.toml --listen 0.0.0.0:8080 --admin-listen 0.0.0.0:8081
# Config mount point: /etc/medley (read-only is enough). The embedded default listens on loopback,
# so the image's default command overrides the listeners to 0.0.0.0 inside the container; keep
# port 8081 (metrics, health) unpublished or on a private network. 8082 is gRPC.

FROM rust:1.95-bookworm AS build
WORKDIR /src
COPY Cargo.toml Cargo.lock build.rs ./
COPY proto ./proto
COPY src ./src
COPY core ./core
COPY config ./config
COPY docs ./docs
COPY benches ./benches
COPY examples ./examples
RUN cargo build --release --locked --bin medley

FROM debian:bookworm-slim
RUN useradd --system --uid 10001 --no-create-home medley && mkdir -p /etc/medley
COPY --from=build /src/target/release/medley /usr/local/bin/medley
COPY config/ /etc/medley/
USER medley
EXPOSE 8080 8081 8082
# debian-slim has no curl; the check sends one request over bash's /dev/tcp and looks for a 200
# status line.
HEALTHCHECK --interval=10s --timeout=2s --retries=3 \
  CMD bash -c 'exec 3<>/dev/tcp/127.0.0.1/8080 && printf "GET /healthz HTTP/1.1\r\nHost: localhost\r\nConnection: close\r\n\r\n" >&3 && head -1 <&3 | grep -q " 200 "'
ENTRYPOINT ["/usr/local/bin/medley"]
CMD ["serve", "--listen", "0.0.0.0:8080", "--admin-listen", "0.0.0.0:8081", "--grpc-listen", "0.0.0.0:8082", "--log-format", "json"]
