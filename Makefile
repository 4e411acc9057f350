# Two commands on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
DEMO_OUT := demo_output

.PHONY: demo test venv clean bench lint mutate test-browser

$(BIN)/activate:
	rm -rf $(VENV)
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

venv-base: $(BIN)/activate
	$(BIN)/python -m pip install --quiet -e '.[all]'

venv-test: $(BIN)/activate
	$(BIN)/python -m pip install --quiet -e '.[test]'

demo: venv-base
	$(BIN)/python sample_catalogues/demo.py --out $(DEMO_OUT)

test: venv-test
	$(BIN)/python -m pytest -n 2 -q

# The browser tests (status page, report) in a headless Chromium: installs Debian's chromium
# and chromium-driver (needs root, or run the apt-get line yourself) and selenium, then runs
# every test marked "browser". `make test` runs them too wherever chromium is present.
test-browser: venv-test
	command -v chromium >/dev/null && command -v chromedriver >/dev/null || \
		apt-get install -y chromium chromium-driver
	$(BIN)/python -m pip install --quiet -e '.[browser]'
	ANNOTATOR_UPDATE_SCREENSHOTS=1 $(BIN)/python -m pytest -q -m browser

bench: venv-test
	$(BIN)/python benchmarks/run_all.py

# Deliberate bugs (tests/mutation/mutants.toml), one at a time in a scratch copy: every one
# must make its tests fail.
mutate: venv-test
	$(BIN)/python tests/mutation/run.py

clean:
	rm -rf $(VENV) $(DEMO_OUT) build *.egg-info
