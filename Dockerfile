# lineside: multi-stage build. The release binary embeds the washer demo model; mount your
# own config and model (e.g. under /srv/lineside) and pass --config to serve something else.
FROM rust:1.95-slim-bookworm AS build
WORKDIR /src
COPY Cargo.toml Cargo.lock ./
COPY src src
COPY tests tests
COPY benches benches
COPY models models
COPY config config
# Portable x86-64 by default: tract picks its AVX2/AVX-512 matrix kernels at run time. For
# boxes with AVX2 (x86-64-v3: most x86 CPUs since 2015, not some Atom/Celeron industrial
# PCs), `--build-arg TARGET_CPU=x86-64-v3` made the demo model 1.3x faster (docs/
# performance.md); such a binary refuses to start on a CPU without AVX2, with a message.
ARG TARGET_CPU=x86-64
RUN RUSTFLAGS="-C target-cpu=${TARGET_CPU}" cargo build --release --locked --bin lineside

FROM debian:bookworm-slim
RUN useradd --system --uid 10001 --no-create-home --shell /usr/sbin/nologin lineside
COPY --from=build /src/target/release/lineside /usr/local/bin/lineside
USER 10001
EXPOSE 8080
ENTRYPOINT ["/usr/local/bin/lineside"]
CMD ["serve", "--listen", "0.0.0.0:8080"]
