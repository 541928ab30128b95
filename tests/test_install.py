# SPDX-License-Identifier: GPL-3.0-or-later
"""CMake install into a temporary prefix, then use only the installed copy:
``from gnuradio import coherer``, grcc with only the installed YAML, the generated
headless script, and the installed ``coherer`` launcher, which must pass the CLI tests
(formats, annotate, malformed input) with nothing of the source tree or the project
venv on its path, find its PyPI dependency (sigmf) brought by the install, start on
kernels the install compiled, and report a missing dependency in one line."""

import filecmp
import os
import re
import pathlib
import shutil
import subprocess
import sys

import pytest

from test_grc import (GRC_DIR, EXAMPLES, REPO, RUN_TIMEOUT_S, check_headless_frequency,
                      check_headless_lock_tags, check_headless_status, coherer_yaml_in, compile_grc,
                      grc_env, run_headless, searched_block_dirs)

SITE_DIR = "lib/python3/dist-packages"     # CONVENTIONS 4: any prefix other than /usr/local
DEPS_DIR = "lib/gr-coherer/python"          # PyPI packages brought by the install
#: Kernel groups the test install compiles (the CLI's; the feed-forward kernel's compile
#: takes minutes and is exercised by make setup and the determinism test).
WARM_GROUPS = "loop;lock"
CLI_TESTS = "each_format or annotate_keeps or malformed or missing_files or out_of_range or raw_arguments"

pytestmark = pytest.mark.skipif(shutil.which("cmake") is None, reason="cmake not installed")


@pytest.fixture(scope="module")
def installed(tmp_path_factory):
    """Configure and install into <tmp>/prefix; returns (prefix, site dir, scratch dir)."""
    tmp = tmp_path_factory.mktemp("cmake_install")
    build, prefix = tmp / "build", tmp / "prefix"
    for cmd in (["cmake", "-S", str(REPO), "-B", str(build), f"-DCMAKE_INSTALL_PREFIX={prefix}",
                 f"-DCOHERER_WARM_KERNELS={WARM_GROUPS}"],
                ["cmake", "--install", str(build)]):
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=RUN_TIMEOUT_S)
        assert proc.returncode == 0, proc.stdout + proc.stderr
    return prefix, prefix / SITE_DIR, tmp


def installed_env(site, scratch):
    """Only the installed package on PYTHONPATH and only the installed YAML for grcc."""
    prefix = pathlib.Path(site).parents[2]
    return grc_env(prefix / "share" / "gnuradio" / "grc" / "blocks", site, scratch)


def test_package_installed_under_gnuradio(installed):
    _, site, _ = installed
    package = site / "gnuradio" / "coherer"
    expected = sorted(p.relative_to(REPO / "python" / "coherer")
                      for p in (REPO / "python" / "coherer").rglob("*.py") if "__pycache__" not in p.parts)
    assert sorted(p.relative_to(package) for p in package.rglob("*.py")) == expected


def test_no_gnuradio_init_installed(installed):
    _, site, _ = installed
    assert not (site / "gnuradio" / "__init__.py").exists()


def test_grc_yaml_installed(installed):
    prefix, _, _ = installed
    blocks = prefix / "share" / "gnuradio" / "grc" / "blocks"
    names = sorted(p.name for p in GRC_DIR.glob("*.yml"))
    assert sorted(p.name for p in blocks.iterdir()) == names
    assert filecmp.cmpfiles(GRC_DIR, blocks, names, shallow=False)[0] == names


def test_examples_installed(installed):
    prefix, _, _ = installed
    examples = prefix / "share" / "gr-coherer" / "examples"
    names = sorted(p.name for p in EXAMPLES.iterdir() if p.suffix in (".grc", ".py"))
    assert sorted(p.name for p in examples.iterdir()) == names


def test_installed_package_imports(installed):
    _, site, scratch = installed
    code = "from gnuradio import coherer; print(coherer.__file__)"
    proc = subprocess.run([sys.executable, "-c", code], env=installed_env(site, scratch), cwd=str(scratch),
                          capture_output=True, text=True, timeout=RUN_TIMEOUT_S)
    assert proc.returncode == 0, proc.stderr
    assert pathlib.Path(proc.stdout.strip().splitlines()[-1]).parent == site / "gnuradio" / "coherer"


@pytest.fixture(scope="module")
def installed_headless(installed):
    """grcc the installed headless example with only the installed YAML, then run it."""
    prefix, site, scratch = installed
    env = installed_env(site, scratch)
    out = scratch / "grcc_out"
    grc = prefix / "share" / "gr-coherer" / "examples" / "qpsk_doppler_headless.grc"
    script, output = compile_grc(grc, out, env)
    text, freq = run_headless(script, env, scratch)
    return output, text, freq, prefix


def test_grcc_used_only_installed_yaml(installed_headless):
    output, _, _, prefix = installed_headless
    blocks = str(prefix / "share" / "gnuradio" / "grc" / "blocks")
    dirs = searched_block_dirs(output)
    assert blocks in dirs
    assert [d for d in dirs if d != blocks and coherer_yaml_in(d)] == []


def test_installed_headless_example_prints_lock_tags(installed_headless):
    _, text, _, _ = installed_headless
    check_headless_lock_tags(text)


def test_installed_headless_example_prints_status(installed_headless):
    _, text, _, _ = installed_headless
    check_headless_status(text)


def test_installed_headless_example_frequency(installed_headless):
    _, _, freq, _ = installed_headless
    check_headless_frequency(freq)


def test_installed_launcher_help(installed):
    prefix, _, scratch = installed
    env = dict(os.environ)
    env.pop("PYTHONPATH", None)          # the launcher finds the installed package itself
    proc = subprocess.run([str(prefix / "bin" / "coherer"), "--help"], env=env, cwd=str(scratch),
                          capture_output=True, text=True, timeout=RUN_TIMEOUT_S)
    assert proc.returncode == 0, proc.stderr
    assert "usage: coherer" in proc.stdout


def test_launcher_runs_the_package_module(installed):
    prefix, _, _ = installed
    text = (prefix / "bin" / "coherer").read_text()
    assert text.startswith("#!/bin/sh") and '/usr/bin/python3 -m gnuradio.coherer "$@"' in text
    assert os.access(prefix / "bin" / "coherer", os.X_OK)



def _bare_env():
    """No PYTHONPATH, no venv, no source tree on PATH."""
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VIRTUAL_ENV")}
    env["PATH"] = os.pathsep.join(p for p in env.get("PATH", "").split(os.pathsep)
                                  if p and not p.startswith(str(REPO)))
    return env


def _system_has_sigmf():
    return subprocess.run(["/usr/bin/python3", "-c", "import sigmf"], env=_bare_env(),
                          capture_output=True).returncode == 0


def test_install_brings_sigmf(installed):
    prefix, site, _ = installed
    if _system_has_sigmf():
        pytest.skip("the system interpreter has sigmf already: nothing to bring")
    assert (prefix / DEPS_DIR / "sigmf" / "__init__.py").exists()
    env = _bare_env()
    env["PYTHONPATH"] = f"{site}:{prefix / DEPS_DIR}"
    proc = subprocess.run(["/usr/bin/python3", "-c", "import sigmf, sigmf.sigmffile; print(sigmf.__file__)"],
                          env=env, capture_output=True, text=True, timeout=RUN_TIMEOUT_S)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip().startswith(str(prefix / DEPS_DIR))


def test_install_compiled_the_kernels(installed):
    prefix, site, scratch = installed
    env = _bare_env()
    env["PYTHONPATH"] = str(site)
    env.pop("NUMBA_CACHE_DIR", None)
    proc = subprocess.run(["/usr/bin/python3", "-m", "gnuradio.coherer._warmup", "--check",
                           *WARM_GROUPS.split(";")], env=env, cwd=str(scratch),
                          capture_output=True, text=True, timeout=RUN_TIMEOUT_S)
    assert proc.returncode == 0 and "not cached: none" in proc.stdout, proc.stdout + proc.stderr
    assert list((site / "gnuradio" / "coherer" / "__pycache__").glob("_loop_kernel.*.nbi"))


def test_installed_launcher_passes_the_cli_tests(installed):
    """The CLI tests of test_cli_run (every SigMF format, annotate, malformed input and
    bad options -> exit 2 with one line) against the installed launcher."""
    prefix, site, scratch = installed
    env = _bare_env()
    env.update({"COHERER_TEST_LAUNCHER": str(prefix / "bin" / "coherer"),
                "COHERER_TEST_PYTHONPATH": f"{site}:{prefix / DEPS_DIR}",
                "COHERER_TEST_INSTALLED": "1", "PYTHONPATH": str(site)})
    env.pop("NUMBA_CACHE_DIR", None)
    proc = subprocess.run(["/usr/bin/python3", "-m", "pytest", "-o", "addopts=", "-q", "-p", "no:cacheprovider",
                           str(REPO / "tests" / "test_cli_run.py"), "-k", CLI_TESTS],
                          env=env, cwd=str(REPO / "tests"), capture_output=True, text=True, timeout=1800)
    assert proc.returncode == 0, proc.stdout[-5000:] + proc.stderr[-2000:]
    summary = proc.stdout.strip().splitlines()[-1]
    passed = re.match(r"(\d+) passed", summary)
    assert passed and int(passed.group(1)) >= 20, summary            # every format, case and option
    assert "failed" not in summary and "error" not in summary, summary


def test_installed_run_starts_without_compiling(installed, tmp_path):
    """The install compiled the kernels: a run prints no compile note."""
    prefix, site, _ = installed
    make = ("import sys; import numpy as np; from gnuradio.coherer.recording import write_sigmf; "
            "rng = np.random.default_rng(3); x = np.exp(1j * np.pi * rng.integers(0, 2, 40000)) + "
            "0.1 * rng.standard_normal(40000); write_sigmf(sys.argv[1], x, 8000.0)")
    env = _bare_env()
    env["PYTHONPATH"] = f"{site}:{prefix / DEPS_DIR}"
    proc = subprocess.run(["/usr/bin/python3", "-c", make, str(tmp_path / "rec")], env=env,
                          capture_output=True, text=True, timeout=RUN_TIMEOUT_S)
    assert proc.returncode == 0, proc.stderr
    env = _bare_env()
    env.pop("NUMBA_CACHE_DIR", None)
    proc = subprocess.run([str(prefix / "bin" / "coherer"), "run", str(tmp_path / "rec.sigmf-meta"),
                           "--power", "2", "--noise-bw", "20"], env=env, cwd=str(tmp_path),
                          capture_output=True, text=True, timeout=RUN_TIMEOUT_S)
    assert proc.returncode == 0, proc.stderr
    assert "compiling signal kernels" not in proc.stderr, proc.stderr
    assert "locked" in proc.stdout


def test_missing_dependency_is_one_line_with_the_fix(installed, tmp_path):
    prefix, _, _ = installed
    if _system_has_sigmf():
        pytest.skip("the system interpreter has sigmf: it cannot go missing here")
    deps = prefix / DEPS_DIR
    hidden = deps.with_name(deps.name + ".hidden")
    deps.rename(hidden)
    try:
        meta = tmp_path / "x.sigmf-meta"
        meta.write_text("{}")
        proc = subprocess.run([str(prefix / "bin" / "coherer"), "run", str(meta), "--power", "2",
                               "--noise-bw", "20"], env=_bare_env(), capture_output=True, text=True,
                              timeout=RUN_TIMEOUT_S)
    finally:
        hidden.rename(deps)
    assert proc.returncode == 2, proc.stderr
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and "Traceback" not in proc.stderr, proc.stderr
    assert "'sigmf' is missing" in lines[0]
    assert f"pip install --no-deps --target '{deps}' 'sigmf>=1.2,<2'" in lines[0]
