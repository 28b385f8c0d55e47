# ratefit — developer entry points. `make test` and `make demo` do all set-up
# on a fresh machine (venv, packages, and the Prometheus server when root).
VENV   ?= .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed-stamp

.PHONY: test demo bench prometheus clean lint

$(STAMP): pyproject.toml
	python3 -m venv $(VENV)
	$(VENV)/bin/pip install --upgrade -q pip
	$(VENV)/bin/pip install -q -e '.[test]'
	touch $(STAMP)

# The tests run the real Prometheus server (Debian package `prometheus`), and the
# profiler's tests a real nginx (Debian package `nginx-light`; installed when root).
prometheus:
	@command -v prometheus >/dev/null 2>&1 && command -v promtool >/dev/null 2>&1 && \
	  { [ "$$(id -u)" != 0 ] || [ -x /usr/sbin/nginx ]; } || { \
	  if [ "$$(id -u)" = 0 ]; then \
	    apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq prometheus nginx-light >/dev/null; \
	    (service prometheus stop || pkill -x prometheus || true) >/dev/null 2>&1; \
	  else echo "Prometheus is missing: sudo apt-get install -y prometheus" >&2; exit 1; fi; }

test: $(STAMP) prometheus
	$(VENV)/bin/pytest

demo: $(STAMP) prometheus
	$(VENV)/bin/ratefit demo

bench: $(STAMP) prometheus
	$(PY) -m tests.bench.all

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache
