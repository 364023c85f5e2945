# simtide's image for docker-compose.yml: built with the same packages scripts/setup.sh
# installs, run on a slim Debian with only the TLS runtime.
FROM rust:1.88-bookworm AS build
RUN apt-get update && apt-get install -y --no-install-recommends clang libclang-dev pkg-config libssl-dev zlib1g-dev make \
    && rm -rf /var/lib/apt/lists/*
WORKDIR /src
COPY . .
RUN cargo build --release --locked --bin simtide

FROM debian:bookworm-slim
RUN apt-get update && apt-get install -y --no-install-recommends libssl3 ca-certificates \
    && rm -rf /var/lib/apt/lists/*
COPY --from=build /src/target/release/simtide /usr/local/bin/simtide
RUN mkdir -p /var/lib/simtide && chown 65534 /var/lib/simtide
USER 65534
ENTRYPOINT ["simtide"]
