# Two commands do all set-up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed

.PHONY: demo test bench clean

$(PY):
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip

$(STAMP): pyproject.toml | $(PY)
	$(PY) -m pip install --quiet -e ".[test]"
	touch $(STAMP)

demo: $(STAMP)
	$(PY) -m audit.cli run sample_site/loops.xlsx --out audit-out --site "Larkmoor Water Reclamation Works" --no-history; \
	  code=$$?; echo ""; echo "Audit written to $(CURDIR)/audit-out/ (open audit-out/report.html)"; \
	  if [ $$code -ge 2 ]; then exit $$code; fi

test: $(STAMP)
	$(PY) -m pytest -q

bench: $(STAMP)
	$(PY) benchmarks/engine.py
	$(PY) benchmarks/site.py

clean:
	rm -rf $(VENV) audit-out
