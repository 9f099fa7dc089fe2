# lineside: multi-stage build. The binary embeds the washer demo model; mount your own config
# and model (e.g. under /srv/lineside) and pass --config to serve something else.
#
#   docker build -t lineside .                                      tract (the default image)
#   docker build --target onnxruntime -t lineside:onnxruntime .     with the onnxruntime engine
#
# The base images are build arguments so that tools/image-test can build this file offline
# against locally made stand-ins; the defaults are the images users get.
ARG RUST_IMAGE=rust:1.95-slim-bookworm
ARG PYTHON_IMAGE=python:3.11-slim-bookworm
ARG RUNTIME_IMAGE=debian:bookworm-slim

FROM ${RUST_IMAGE} AS build
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
# One binary for both images: the onnxruntime engine is compiled in but loads its library
# only when a model uses it (nothing is linked at build time).
ARG TARGET_CPU=x86-64
RUN RUSTFLAGS="-C target-cpu=${TARGET_CPU}" \
    cargo build --profile dist --locked --bin lineside --features onnxruntime

# The onnxruntime shared library, from the PyPI wheel (the version the tests use:
# tools/requirements.txt). Built only for the onnxruntime target.
FROM ${PYTHON_IMAGE} AS onnxruntime-library
ARG ONNXRUNTIME_VERSION=1.32.0
RUN pip install --no-cache-dir --no-deps --only-binary=:all: --target /wheel \
        "onnxruntime==${ONNXRUNTIME_VERSION}" \
    && mkdir -p /opt/onnxruntime \
    && cp /wheel/onnxruntime/capi/libonnxruntime.so.* /opt/onnxruntime/libonnxruntime.so

# The runtime: no build tools, a numeric non-root user (no passwd entry needed).
FROM ${RUNTIME_IMAGE} AS runtime
COPY --from=build /src/target/dist/lineside /usr/local/bin/lineside
USER 10001:10001
EXPOSE 8080
ENTRYPOINT ["/usr/local/bin/lineside"]
CMD ["serve", "--listen", "0.0.0.0:8080"]

# The runtime plus onnxruntime: select it per model (`engine = "onnxruntime"`), for every
# model (`serve --engine onnxruntime`) or as the default (`-e LINESIDE_ENGINE=onnxruntime`).
FROM runtime AS onnxruntime
COPY --from=onnxruntime-library /opt/onnxruntime/libonnxruntime.so /opt/onnxruntime/libonnxruntime.so
ENV ORT_DYLIB_PATH=/opt/onnxruntime/libonnxruntime.so

# The default image (the last stage): the runtime above, tract only in use.
FROM runtime
