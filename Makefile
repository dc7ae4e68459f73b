# Two commands for a fresh clone: `make run` and `make test`. Each creates .venv when missing.
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
CRANFIELD ?= ../shared/data/cranfield

.PHONY: run test lint eval-cranfield bench clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || python3 -m venv $(VENV)
	$(BIN)/pip install --quiet -e '.[dev]'
	touch $(STAMP)

run: $(STAMP)
	$(BIN)/excerpta migrate
	$(BIN)/excerpta demo --corpus corpus_example
	$(BIN)/excerpta serve

lint: $(STAMP)
	$(BIN)/ruff check service tests migrations
	$(BIN)/ruff format --check service tests migrations
	$(BIN)/mypy service

test: lint
	$(BIN)/pytest -q

eval-cranfield: $(STAMP)
	@test -d $(CRANFIELD) || { echo "no Cranfield data at $(CRANFIELD)"; exit 1; }
	rm -rf data/cranfield-eval
	$(BIN)/excerpta ingest cranfield $(CRANFIELD)/documents.jsonl --schema $(CRANFIELD)/schema.json --data-dir data/cranfield-eval || true
	$(BIN)/excerpta eval cranfield --data-dir data/cranfield-eval --queries $(CRANFIELD)/queries.tsv --qrels $(CRANFIELD)/qrels.txt --out data/cranfield-eval/report

bench: $(STAMP)
	$(BIN)/excerpta bench --chunks 10000,100000

clean:
	rm -rf $(VENV) data .pytest_cache .mypy_cache .ruff_cache
