# Build and run weir in a container. Nothing is fetched at run time.
FROM rust:1.95-bookworm AS build
WORKDIR /src
COPY Cargo.toml Cargo.lock ./
COPY src ./src
RUN cargo build --release --locked

FROM debian:bookworm-slim
RUN useradd --system --home /var/lib/weir weir && mkdir -p /var/lib/weir && chown weir /var/lib/weir
COPY --from=build /src/target/release/weir /usr/local/bin/weir
COPY config /etc/weir
COPY demo-data /usr/share/weir/demo-data
USER weir
WORKDIR /var/lib/weir
ENTRYPOINT ["weir"]
CMD ["train", "--data", "/usr/share/weir/demo-data/claims.ndjson", "--out", "/var/lib/weir/model.json", "--report", "/var/lib/weir/report.json", "--config", "/etc/weir/weir.toml"]
