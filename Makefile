# The two commands of the README: `make demo` and `make test`.
# Everything else (venv, pinned install) is set up on demand from python3 alone.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed-stamp
CORES ?= 2
CONFIG ?= config/config.yaml
# Pin BLAS/OpenMP threads: jobs run side by side, and one thread per job keeps
# floating-point results identical whatever --cores is (docs/architecture.md, invariant 2).
export OPENBLAS_NUM_THREADS := 1
export OMP_NUM_THREADS := 1
export MKL_NUM_THREADS := 1
# SET='study.seed=3 glm.noise_model=ols': dotted overrides of the study config (Snakemake's
# --config refuses dotted keys; foldwise reads them from its `set` entry). Values without spaces.
OVERRIDES = $(if $(SET),'set=$(SET)')
# PACKAGE_CHANGE=rerun: run although installed packages differ from the lock (every job reruns).
ifdef PACKAGE_CHANGE
export FOLDWISE_PACKAGE_CHANGE := $(PACKAGE_CHANGE)
endif

.PHONY: demo study check test env bundle verify benchmark lint cluster-test clean store-check store-clean calibrate figures

$(STAMP): requirements/lock.txt pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --disable-pip-version-check --upgrade pip==26.3
	$(BIN)/python -m pip install --quiet --disable-pip-version-check -r requirements/lock.txt
	$(BIN)/python -m pip install --quiet --disable-pip-version-check --no-deps --no-build-isolation -e .
	touch $(STAMP)

env: $(STAMP)

demo: $(STAMP)
	$(BIN)/snakemake --profile config/profiles/local --cores $(CORES) --config config_file=$(CONFIG) $(OVERRIDES)

# A study of your own: make check CONFIG=config/my_study.yaml, then make study CONFIG=config/my_study.yaml
study: $(STAMP)
	$(BIN)/snakemake --profile config/profiles/local --cores $(CORES) --config config_file=$(CONFIG) $(OVERRIDES)

# The design self-check: every decoding analysis on noise of the study's own design (docs/inference.md); not part of `make demo`.
calibrate: $(STAMP)
	$(BIN)/snakemake --profile config/profiles/local --cores $(CORES) --config config_file=$(CONFIG) $(OVERRIDES) -- calibration

# The result figures' publication files (PNG 300 dpi, SVG, PDF) for a paper; not part of `make demo` (docs/report.md).
figures: $(STAMP)
	$(BIN)/snakemake --profile config/profiles/local --cores $(CORES) --config config_file=$(CONFIG) $(OVERRIDES) -- paper_figures

# What the dataset holds per subject, and every configured condition some subject lacks (reads headers only).
check: $(STAMP)
	$(BIN)/python -m foldwise.data.check --config $(CONFIG)

# A dry run: validates the study config and lists the jobs it would run, without running any.
.PHONY: dry-run config-reference
dry-run: $(STAMP)
	$(BIN)/snakemake -n --quiet rules --profile config/profiles/local --cores $(CORES) --config config_file=$(CONFIG) $(OVERRIDES)

# Rewrite the README's config reference from config/schema.yaml (tests/test_readme.py checks they agree).
config-reference: $(STAMP)
	cd workflow && ../$(BIN)/python -m foldwise.report.config_reference --write ../README.md

test: $(STAMP)
	$(BIN)/python -m pytest $(PYTEST_ARGS)

lint: $(STAMP)
	$(BIN)/snakemake --lint --config config_file=$(CONFIG)

bundle: $(STAMP)
	$(BIN)/python -m foldwise.provenance.bundle make --config $(CONFIG) $(if $(INCLUDE_IMAGES),--include-images)

verify: $(STAMP)
	$(BIN)/python -m foldwise.provenance.bundle verify --cores $(CORES) --config $(CONFIG)

benchmark: $(STAMP)
	for script in benchmarks/bench_*.py; do $(BIN)/python $$script || exit 1; done

# A real one-node SLURM cluster on localhost (root: installs slurm-wlm and munge).
cluster-test: $(STAMP)
	bash tests/cluster/run_slurm_test.sh

# The content memo's store: verify every entry; drop what no manifest reaches (MANIFESTS='a.tsv b.tsv' for a shared store).
store-check: $(STAMP)
	$(BIN)/python -m foldwise.provenance.store check --config $(CONFIG)

store-clean: $(STAMP)
	$(BIN)/python -m foldwise.provenance.store clean --config $(CONFIG) $(foreach manifest,$(MANIFESTS),--manifest $(manifest))

# Removes the results folder of CONFIG (study.results_dir, checked never to be code or the checkout) and .snakemake.
clean: $(STAMP)
	folder=$$($(BIN)/python -m foldwise.results_folder --config $(CONFIG)) && rm -rf "$$folder" .snakemake
