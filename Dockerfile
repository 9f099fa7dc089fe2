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
# Portable x86-64 build: tract picks its AVX2/AVX-512 kernels at run time, so no
# target-cpu flag is needed (FACTS.md: -C target-cpu=native changed little).
RUN cargo build --release --locked --bin lineside

FROM debian:bookworm-slim
RUN useradd --system --uid 10001 --no-create-home --shell /usr/sbin/nologin lineside
COPY --from=build /src/target/release/lineside /usr/local/bin/lineside
USER 10001
EXPOSE 8080
ENTRYPOINT ["/usr/local/bin/lineside"]
CMD ["serve", "--listen", "0.0.0.0:8080"]
