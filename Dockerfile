# Multi-stage build: compile in the Rust image, run from a slim Debian image as a non-root user.
FROM rust:1.95-slim-bookworm AS build
WORKDIR /src
COPY Cargo.toml Cargo.lock ./
COPY src ./src
# src/api/routes/page.rs includes the explorer page at compile time (tests/deploy_files.rs checks every include).
COPY assets ./assets
COPY benches ./benches
# src/api/openapi.rs includes the document's examples (the service's answers to its example requests).
COPY openapi/examples ./openapi/examples
RUN cargo build --release --locked --bin tailtally

FROM debian:bookworm-slim
RUN apt-get update && apt-get install -y --no-install-recommends curl ca-certificates && rm -rf /var/lib/apt/lists/* \
    && useradd --system --uid 10001 --no-create-home tailtally
COPY --from=build /src/target/release/tailtally /usr/local/bin/tailtally
COPY fixtures /srv/fixtures
USER 10001
ENV TAILTALLY_LISTEN=0.0.0.0:8080 TAILTALLY_LOG_FORMAT=json
EXPOSE 8080
HEALTHCHECK --interval=10s --timeout=3s --retries=3 CMD curl -fsS http://127.0.0.1:8080/healthz || exit 1
ENTRYPOINT ["/usr/local/bin/tailtally"]
