# SPDX-License-Identifier: GPL-3.0-or-later
"""CMake install into a temporary prefix, then use only the installed copy:
``from gnuradio import coherer``, grcc with only the installed YAML, the generated
headless script, and the installed ``coherer`` launcher."""

import filecmp
import os
import pathlib
import shutil
import subprocess
import sys

import pytest

from test_grc import (GRC_DIR, EXAMPLES, REPO, RUN_TIMEOUT_S, check_headless_frequency,
                      check_headless_lock_tags, check_headless_status, coherer_yaml_in, compile_grc,
                      grc_env, run_headless, searched_block_dirs)

SITE_DIR = "lib/python3/dist-packages"     # CONVENTIONS 4: any prefix other than /usr/local

pytestmark = pytest.mark.skipif(shutil.which("cmake") is None, reason="cmake not installed")


@pytest.fixture(scope="module")
def installed(tmp_path_factory):
    """Configure and install into <tmp>/prefix; returns (prefix, site dir, scratch dir)."""
    tmp = tmp_path_factory.mktemp("cmake_install")
    build, prefix = tmp / "build", tmp / "prefix"
    for cmd in (["cmake", "-S", str(REPO), "-B", str(build), f"-DCMAKE_INSTALL_PREFIX={prefix}"],
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

