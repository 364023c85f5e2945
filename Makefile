# The two commands a newcomer needs are `make demo` and `make test`; both install what
# they need first (scripts/setup.sh, idempotent). Builds go to a fixed target directory
# outside the clone so that repeat runs reuse them.
export CARGO_TARGET_DIR ?= /var/cache/simtide/target
CARGO ?= cargo

.PHONY: demo test lint bench setup-build setup-test

setup-build:
	bash scripts/setup.sh build

setup-test:
	bash scripts/setup.sh test

demo: setup-build
	$(CARGO) run --release --locked --quiet -- demo

# The standby failover test runs alone after the rest: its 3 s lease timeout does not
# hold while other tests load both cores (DEVELOPERS.md, "Build and test").
test: setup-test
	$(CARGO) test --release --locked --workspace -- --skip live::standby
	$(CARGO) test --release --locked --test integration live::standby

lint: setup-build
	$(CARGO) fmt --all -- --check
	$(CARGO) clippy --release --locked --workspace --all-targets -- -D warnings

bench: setup-test
	$(CARGO) build --release --locked
	bash scripts/bench.sh
	$(CARGO) bench --locked --bench live_throughput
	$(CARGO) bench --locked --bench http_lookups
	$(CARGO) bench --locked --bench shard_scaling
