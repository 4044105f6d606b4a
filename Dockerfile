# Build and run weir in a container. Nothing is fetched at run time.
FROM rust:1.95-bookworm AS build
WORKDIR /src
COPY Cargo.toml Cargo.lock ./
COPY src ./src
COPY migrations ./migrations
# Cargo reads every declared target when it loads the manifest.
COPY benches ./benches
COPY examples ./examples
COPY config ./config
RUN cargo build --release --locked

FROM debian:bookworm-slim
RUN useradd --system --home /var/lib/weir weir && mkdir -p /var/lib/weir && chown weir /var/lib/weir
COPY --from=build /src/target/release/weir /usr/local/bin/weir
COPY config /etc/weir
COPY demo-data /usr/share/weir/demo-data
USER weir
WORKDIR /var/lib/weir
# Paths inside the container; every key can be overridden the same way (WEIR_SECTION_KEY).
ENV WEIR_SERVER_LISTEN=0.0.0.0:8080 \
    WEIR_STORE_PATH=/var/lib/weir/store \
    WEIR_PATHS_MODEL=/var/lib/weir/model.json \
    WEIR_PATHS_RULES=/etc/weir/rules.toml \
    WEIR_ACCESS_KEY_FILE=/etc/weir-keys/keys.toml \
    WEIR_SERVER_LOG_FORMAT=json
EXPOSE 8080
# Train a model first (weir train ... --out /var/lib/weir/model.json), e.g. on the demo data
# shipped in /usr/share/weir/demo-data, and mount a key file made with `weir keys add` at
# /etc/weir-keys/keys.toml (it holds only hashes), then serve. TLS belongs to the proxy in
# front (ops/reverse-proxy/nginx.conf).
ENTRYPOINT ["weir"]
CMD ["serve", "--config", "/etc/weir/weir.toml"]
