# ratefit — developer entry points. `make test` and `make demo` do all set-up
# on a fresh machine (venv, packages, and the Prometheus server when root; `make demo`
# also runs without root and without Prometheus).
VENV   ?= .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed-stamp

.PHONY: test demo bench prometheus prometheus-optional clean lint

$(STAMP): pyproject.toml
	python3 -m venv $(VENV)
	$(VENV)/bin/pip install --upgrade -q pip
	$(VENV)/bin/pip install -q -e '.[test]'
	touch $(STAMP)

# The tests run the real Prometheus server (Debian package `prometheus`).
# As root on a machine without it, the package is installed; its postinst starts the
# packaged service (port 9090), which the tests do not use: that one service is stopped
# by its unit (systemctl, else the init script) — never a process found by name.
# Without root, `prometheus-optional` only says what is missing (the demo then replays
# the history file); `prometheus` fails with the command to run.
PROMETHEUS_UNIT ?= prometheus

prometheus-optional:
	@command -v prometheus >/dev/null 2>&1 && command -v promtool >/dev/null 2>&1 || { \
	  if [ "$$(id -u)" = 0 ]; then \
	    apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq prometheus >/dev/null; \
	    if command -v systemctl >/dev/null 2>&1 && systemctl is-active --quiet $(PROMETHEUS_UNIT) 2>/dev/null; then \
	      systemctl stop $(PROMETHEUS_UNIT); \
	    elif command -v service >/dev/null 2>&1; then \
	      service $(PROMETHEUS_UNIT) stop >/dev/null 2>&1 || true; \
	    fi; \
	  else echo "note: Prometheus is not installed (sudo apt-get install -y prometheus); continuing without it" >&2; fi; }

prometheus: prometheus-optional
	@command -v prometheus >/dev/null 2>&1 && command -v promtool >/dev/null 2>&1 || { \
	  echo "Prometheus is missing: sudo apt-get install -y prometheus" >&2; exit 1; }

# The profiler's tests drive a real nginx (Debian package `nginx-light`), installed when
# root; its packaged service is stopped by its unit, like Prometheus's. Without root the
# profiler's nginx tests skip with a note.
nginx:
	@[ -x /usr/sbin/nginx ] || { \
	  if [ "$$(id -u)" = 0 ]; then \
	    apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq nginx-light >/dev/null; \
	    if command -v systemctl >/dev/null 2>&1 && systemctl is-active --quiet nginx 2>/dev/null; then \
	      systemctl stop nginx; \
	    elif command -v service >/dev/null 2>&1; then \
	      service nginx stop >/dev/null 2>&1 || true; \
	    fi; \
	  else echo "note: nginx is not installed (sudo apt-get install -y nginx-light); its tests skip" >&2; fi; }

test: $(STAMP) prometheus nginx
	$(VENV)/bin/pytest

# Works without root and without Prometheus: the demo then replays the history file
# (it says so in one line).
demo: $(STAMP) prometheus-optional
	$(VENV)/bin/ratefit demo

bench: $(STAMP) prometheus
	$(PY) -m tests.bench.all

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache
