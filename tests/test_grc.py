# SPDX-License-Identifier: GPL-3.0-or-later
"""GNU Radio Companion integration: block YAML, category tree, asserts, example flowgraphs.

- every ``grc/*.block.yml`` passes GRC's own schema validator, and the platform loads
  them (with the framework's blocks) without a warning, in the ``[Coherer]`` tree;
- parameter ids are the constructor's argument names, callbacks are real setters, the
  diagnostic outputs appear only when switched on;
- every YAML assert rejects a bad value in GRC validation, and the block constructor
  rejects the same value (accepts the edge value GRC accepts);
- ``grcc`` compiles every example with only this repository's YAML; the headless
  flowgraph runs and what it printed and wrote is checked; the GUI and hardware
  flowgraphs are imported (offscreen, never run); the scripted example runs.
"""

import inspect
import logging
import math
import os
import pathlib
import re
import subprocess
import sys
from math import comb, factorial

import numpy as np
import pytest
import yaml
from gnuradio import gr

from gnuradio import coherer

REPO = pathlib.Path(__file__).resolve().parents[1]
GRC_DIR = REPO / "grc"
EXAMPLES = REPO / "examples"
SYSTEM_BLOCKS = "/usr/share/gnuradio/grc/blocks"
BLOCK_FILES = sorted(GRC_DIR.glob("*.block.yml"))
EXAMPLE_GRC = sorted(EXAMPLES.glob("*.grc"))
RUN_TIMEOUT_S = 300


# --- helpers shared with test_install.py ---------------------------------------------

def load_yaml(path):
    with open(path, encoding="utf-8") as f:
        return yaml.safe_load(f)


def flowgraph_id(grc_path):
    """The options-block id of a .grc file (the name of the script grcc generates)."""
    return load_yaml(grc_path)["options"]["parameters"]["id"]


def grc_env(blocks_path, pythonpath, scratch):
    """Environment for grcc / generated scripts: only ``blocks_path`` (plus the framework's
    own blocks) on GRC's search path, ``pythonpath`` for imports, no display."""
    empty = pathlib.Path(scratch) / "empty_blocks_dir"
    empty.mkdir(parents=True, exist_ok=True)
    env = dict(os.environ)
    env.pop("DISPLAY", None)
    env.update({
        "GRC_BLOCKS_PATH": str(blocks_path),
        "GR_CONF_GRC_LOCAL_BLOCKS_PATH": str(empty),   # no ~/.grc_gnuradio or /usr/local blocks
        "GRC_HIER_PATH": str(empty),
        "PYTHONPATH": str(pythonpath),
        "QT_QPA_PLATFORM": "offscreen",
        "PYTHONDONTWRITEBYTECODE": "1",
    })
    return env


def compile_grc(grc_path, out_dir, env):
    """Run grcc; returns (generated script path, grcc output). Fails the test on error."""
    proc = subprocess.run(["grcc", "-o", str(out_dir), str(grc_path)], env=env, capture_output=True,
                          text=True, timeout=RUN_TIMEOUT_S)
    output = proc.stdout + proc.stderr
    assert proc.returncode == 0, output
    return pathlib.Path(out_dir) / f"{flowgraph_id(grc_path)}.py", output


def searched_block_dirs(grcc_output):
    """The 'Block paths:' list that grcc prints."""
    lines = grcc_output.split("Block paths:", 1)[1].splitlines()
    dirs = []
    for line in lines[1:]:
        if not line.startswith("\t"):
            break
        dirs.append(line.strip())
    return dirs


def coherer_yaml_in(directory):
    return sorted(pathlib.Path(directory).rglob("coherer*.yml")) if os.path.isdir(directory) else []


def import_generated(script, env, class_name, argv=()):
    """Import a generated script in a fresh interpreter without running its top block;
    returns the parsed command-line defaults (dict) printed by the child."""
    code = (
        "import importlib.util, json, sys\n"
        "from gnuradio import gr\n"
        f"spec = importlib.util.spec_from_file_location('generated_fg', {str(script)!r})\n"
        "mod = importlib.util.module_from_spec(spec)\n"
        "spec.loader.exec_module(mod)\n"
        f"cls = getattr(mod, {class_name!r})\n"
        "assert issubclass(cls, gr.top_block), cls\n"
        "parser = getattr(mod, 'argument_parser', None)\n"
        f"opts = vars(parser().parse_args({list(argv)!r})) if parser else {{}}\n"
        "print('GENERATED-OPTIONS ' + json.dumps(opts))\n"
    )
    proc = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                          timeout=RUN_TIMEOUT_S)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    line = [ln for ln in proc.stdout.splitlines() if ln.startswith("GENERATED-OPTIONS ")][-1]
    return yaml.safe_load(line.split(" ", 1)[1])


def parse_lock_tags(text):
    """(offset, locked) of every carrier_lock tag printed by a Tag Debug block."""
    pattern = r"Offset: (\d+)\s+Source: \S+\s+Key: carrier_lock\s+Value: (#t|#f)"
    return [(int(o), v == "#t") for o, v in re.findall(pattern, text)]


def parse_status_prints(text):
    """Status dicts printed by a Message Debug block, as Python dicts."""
    out = []
    for line in text.splitlines():
        if line.startswith("((") and "(locked . " in line:
            d = {}
            for key, value in re.findall(r"\((\w+) \. ([^()]+)\)", line):
                d[key] = {"#t": True, "#f": False}.get(value, None)
                if d[key] is None:
                    d[key] = float(value)
            out.append(d)
    return out


@pytest.fixture(scope="session")
def source_shim(tmp_path_factory):
    """D with D/gnuradio/coherer -> python/coherer and no D/gnuradio/__init__.py."""
    d = tmp_path_factory.mktemp("shim")
    (d / "gnuradio").mkdir()
    (d / "gnuradio" / "coherer").symlink_to(REPO / "python" / "coherer", target_is_directory=True)
    return d


# --- YAML schema and platform load -----------------------------------------------------

@pytest.mark.parametrize("path", BLOCK_FILES, ids=lambda p: p.name)
def test_block_yaml_passes_grc_schema(path):
    from gnuradio.grc.core import schema_checker
    validator = schema_checker.Validator(schema_checker.BLOCK_SCHEME)
    validator.run(load_yaml(path))
    assert validator.messages == []


@pytest.mark.parametrize("path", BLOCK_FILES, ids=lambda p: p.name)
def test_block_file_name_matches_id(path):
    assert load_yaml(path)["id"] + ".block.yml" == path.name


class _Records(logging.Handler):
    def __init__(self):
        super().__init__(logging.DEBUG)
        self.records = []

    def emit(self, record):
        self.records.append(record)


@pytest.fixture(scope="module")
def platform_load():
    """A GRC platform built from grc/ plus the framework's blocks; also the log records."""
    from gnuradio.grc.core.platform import Platform
    handler = _Records()
    logger = logging.getLogger("gnuradio.grc")
    logger.addHandler(handler)
    try:
        platform = Platform(name="GNU Radio Companion", prefs=gr.prefs(), version=gr.version(),
                            version_parts=(gr.major_version(), gr.api_version(), gr.minor_version()))
        platform.build_library(path=[str(GRC_DIR), SYSTEM_BLOCKS])
    finally:
        logger.removeHandler(handler)
    return platform, handler.records


def test_platform_load_has_no_warnings(platform_load):
    _, records = platform_load
    assert [r.getMessage() for r in records if r.levelno >= logging.WARNING] == []


@pytest.mark.parametrize("path", BLOCK_FILES, ids=lambda p: p.name)
def test_platform_finds_block(platform_load, path):
    platform, _ = platform_load
    assert load_yaml(path)["id"] in platform.blocks


def _tree_ids(node):
    if isinstance(node, str):
        return [node]
    if isinstance(node, list):
        return [i for item in node for i in _tree_ids(item)]
    return [i for value in node.values() for i in _tree_ids(value)]


def test_tree_lists_every_block_once():
    ids = _tree_ids(load_yaml(GRC_DIR / "coherer.tree.yml"))
    assert sorted(ids) == sorted(load_yaml(p)["id"] for p in BLOCK_FILES)


@pytest.mark.parametrize("path", BLOCK_FILES, ids=lambda p: p.name)
def test_block_appears_under_coherer_category(platform_load, path):
    platform, _ = platform_load
    category = platform.blocks[load_yaml(path)["id"]].category
    assert category[0] == "Coherer" and len(category) == 2


# --- YAML vs the Python blocks ------------------------------------------------------------

def python_class(block_yaml):
    return getattr(coherer, block_yaml["id"][len("coherer_"):])


def constructor_args(cls):
    params = list(inspect.signature(cls.__init__).parameters)
    return [p for p in params[1:] if p != "name"]


@pytest.mark.parametrize("path", BLOCK_FILES, ids=lambda p: p.name)
def test_parameter_ids_are_constructor_arguments(path):
    data = load_yaml(path)
    assert sorted(p["id"] for p in data["parameters"]) == sorted(constructor_args(python_class(data)))


@pytest.mark.parametrize("path", BLOCK_FILES, ids=lambda p: p.name)
def test_make_template_passes_every_parameter(path):
    data = load_yaml(path)
    make = data["templates"]["make"]
    assert make.lstrip().startswith(f"coherer.{data['id'][len('coherer_'):]}(")
    for p in data["parameters"]:
        assert re.search(r"\$\{[^}]*\b" + p["id"] + r"\b", make), p["id"]


# Runtime setters per block (the design contract); each must be a GRC callback.
RUNTIME_SETTERS = {
    "coherer_mth_power_loop_cc": ["set_damping", "set_freq_guess_hz", "set_noise_bw_hz"],
    "coherer_squaring_loop_cc": ["set_damping", "set_freq_guess_hz", "set_noise_bw_hz"],
    "coherer_lock_detector_cc": [],
    "coherer_mth_power_feedforward_cc": [],
}

# Tag keys and message ports each block's documentation must name, and its message ports.
_LOOP_KEYS = [coherer.metadata.CYCLE_SLIP, coherer.metadata.CARRIER_FREQ, coherer.metadata.COMMAND_PORT]
DOC_KEYS = {
    "coherer_mth_power_loop_cc": _LOOP_KEYS,
    "coherer_squaring_loop_cc": _LOOP_KEYS,
    "coherer_lock_detector_cc": [coherer.metadata.CARRIER_LOCK, coherer.metadata.CARRIER_STATUS,
                                 coherer.metadata.STATUS_PORT],
    "coherer_mth_power_feedforward_cc": [],
}
MESSAGE_PORTS = {
    "coherer_mth_power_loop_cc": {coherer.metadata.COMMAND_PORT},
    "coherer_squaring_loop_cc": {coherer.metadata.COMMAND_PORT},
    "coherer_lock_detector_cc": {coherer.metadata.STATUS_PORT},
    "coherer_mth_power_feedforward_cc": set(),
}


@pytest.mark.parametrize("path", BLOCK_FILES, ids=lambda p: p.name)
def test_callbacks_are_the_runtime_setters(path):
    data = load_yaml(path)
    callbacks = sorted(re.match(r"(\w+)\(", c).group(1) for c in data["templates"].get("callbacks", []))
    assert callbacks == RUNTIME_SETTERS[data["id"]]
    assert all(callable(getattr(python_class(data), c, None)) for c in callbacks)


@pytest.mark.parametrize("path", BLOCK_FILES, ids=lambda p: p.name)
def test_documentation_names_every_tag_key_and_port(path):
    data = load_yaml(path)
    doc = data["documentation"]
    assert [k for k in DOC_KEYS[data["id"]] if k not in doc] == []


@pytest.mark.parametrize("path", BLOCK_FILES, ids=lambda p: p.name)
def test_message_ports_match_metadata_and_are_optional(path):
    data = load_yaml(path)
    ports = [p for p in data.get("inputs", []) + data.get("outputs", []) if p["domain"] == "message"]
    assert {p["id"] for p in ports} == MESSAGE_PORTS[data["id"]]
    assert all(p.get("optional") is True for p in ports)


def make_flowgraph(platform, block_id, params):
    """A flowgraph holding one block ``dut`` with ``params`` (GRC code strings), validated."""
    fg = platform.make_flow_graph()
    fg.import_data({
        "options": {"parameters": {"id": "assert_probe", "generate_options": "no_gui"}, "states": {}},
        "blocks": [{"name": "dut", "id": block_id, "parameters": dict(params), "states": {"state": "enabled"}}],
        "connections": [], "metadata": {"file_format": 1}})
    fg.rewrite()
    fg.validate()
    return fg, next(b for b in fg.blocks if b.name == "dut")


@pytest.mark.parametrize("block_id", ["coherer_mth_power_loop_cc", "coherer_squaring_loop_cc"])
@pytest.mark.parametrize("diagnostics,visible", [("False", 1), ("True", 4)])
def test_diagnostic_outputs_shown_only_when_on(platform_load, block_id, diagnostics, visible):
    platform, _ = platform_load
    _, block = make_flowgraph(platform, block_id, {"sample_rate": "48000", "diagnostics": diagnostics})
    assert len([p for p in block.sources if not p.hidden and p.domain == "stream"]) == visible


# --- every assert rejects a bad value --------------------------------------------------

BASE = {
    "coherer_mth_power_loop_cc": dict(
        sample_rate="48000", power="4", noise_bw_hz="50.0", damping="0.707", loop_order="2",
        freq_guess_hz="0.0", freq_range_hz="None", acquire="True", point_angle="None",
        tag_interval="0", diagnostics="False"),
    "coherer_squaring_loop_cc": dict(
        sample_rate="48000", noise_bw_hz="50.0", damping="0.707", loop_order="2",
        freq_guess_hz="0.0", freq_range_hz="None", acquire="True", point_angle="0.0",
        tag_interval="0", diagnostics="False"),
    "coherer_lock_detector_cc": dict(
        sample_rate="48000", power="4", window="1024", lock_threshold="None",
        unlock_threshold="None", point_angle="None", status_interval="0"),
}

# (block, assert expression, bad values, accepted edge values). Edge values check that
# the YAML and the constructor agree on where the allowed range ends.
L, S, D = "coherer_mth_power_loop_cc", "coherer_squaring_loop_cc", "coherer_lock_detector_cc"
ASSERT_CASES = [
    (L, "0 < sample_rate < float('inf')", [{"sample_rate": "0"}, {"sample_rate": "float('inf')"}], []),
    (L, "1 <= power <= 16", [{"power": "0"}, {"power": "17"}], [{"power": "16"}, {"power": "1"}]),
    (L, "noise_bw_hz > 0", [{"noise_bw_hz": "0"}, {"noise_bw_hz": "-5"}], [{"noise_bw_hz": "1e-3"}]),
    (L, "noise_bw_hz <= 0.1 * sample_rate", [{"noise_bw_hz": "4800.5"}], [{"noise_bw_hz": "4800"}]),
    (L, "0 < damping <= 10", [{"damping": "0"}, {"damping": "10.01"}], [{"damping": "10"}]),
    (L, "freq_range_hz is None or 0 < freq_range_hz <= sample_rate / (2 * power)",
     [{"freq_range_hz": "0"}, {"freq_range_hz": "6000.5"}], [{"freq_range_hz": "6000"}]),
    (L, "abs(freq_guess_hz) <= (sample_rate / (2 * power) if freq_range_hz is None else freq_range_hz)",
     [{"freq_guess_hz": "-6000.5"}, {"freq_range_hz": "100", "freq_guess_hz": "101"}],
     [{"freq_guess_hz": "-6000"}, {"freq_range_hz": "100", "freq_guess_hz": "100"}]),
    (L, "point_angle is None or abs(point_angle) < float('inf')",
     [{"point_angle": "float('nan')"}, {"point_angle": "float('-inf')"}], [{"point_angle": "-3.0"}]),
    (L, "tag_interval >= 0", [{"tag_interval": "-1"}], [{"tag_interval": "0"}, {"tag_interval": "1"}]),

    (S, "0 < sample_rate < float('inf')", [{"sample_rate": "-48000"}], []),
    (S, "noise_bw_hz > 0", [{"noise_bw_hz": "0"}], [{"noise_bw_hz": "1e-3"}]),
    (S, "noise_bw_hz <= 0.1 * sample_rate", [{"noise_bw_hz": "4801"}], [{"noise_bw_hz": "4800"}]),
    (S, "0 < damping <= 10", [{"damping": "-0.1"}, {"damping": "11"}], [{"damping": "0.05"}]),
    (S, "freq_range_hz is None or 0 < freq_range_hz <= sample_rate / 4",
     [{"freq_range_hz": "-1"}, {"freq_range_hz": "12000.5"}], [{"freq_range_hz": "12000"}]),
    (S, "abs(freq_guess_hz) <= (sample_rate / 4 if freq_range_hz is None else freq_range_hz)",
     [{"freq_guess_hz": "12001"}, {"freq_range_hz": "50", "freq_guess_hz": "-51"}],
     [{"freq_guess_hz": "12000"}]),
    (S, "abs(point_angle) < float('inf')", [{"point_angle": "float('inf')"}], [{"point_angle": "3.0"}]),
    (S, "tag_interval >= 0", [{"tag_interval": "-100"}], [{"tag_interval": "100"}]),

    (D, "0 < sample_rate < float('inf')", [{"sample_rate": "0"}], []),
    (D, "1 <= power <= 16", [{"power": "0"}, {"power": "17"}], [{"power": "16"}]),
    (D, "32 <= window <= 1048576", [{"window": "31"}, {"window": "1048577"}],
     [{"window": "32"}, {"window": "1048576"}]),
    (D, "status_interval == 0 or status_interval >= window", [{"status_interval": "1023"}],
     [{"status_interval": "1024"}]),
    (D, "lock_threshold is None or 0 < lock_threshold <= 1", [{"lock_threshold": "0"}, {"lock_threshold": "1.5"}],
     [{"lock_threshold": "1.0"}]),
    (D, "unlock_threshold is None or 0 <= unlock_threshold", [{"unlock_threshold": "-0.01"}],
     [{"unlock_threshold": "0.0"}]),
    # default lock threshold for window 1024: Qinv(1e-6)/sqrt(2048) = 0.10504 (REFERENCES 7.2 rule)
    (D, "unlock_threshold is None or unlock_threshold <= (4.753424308822899 / (2 * window) ** 0.5 "
        "if lock_threshold is None else lock_threshold)",
     [{"lock_threshold": "0.5", "unlock_threshold": "0.6"}, {"unlock_threshold": "0.106"}],
     [{"lock_threshold": "0.5", "unlock_threshold": "0.5"}, {"unlock_threshold": "0.105"}]),
    (D, "point_angle is None or abs(point_angle) < float('inf')", [{"point_angle": "float('nan')"}],
     [{"point_angle": "0.0"}]),
]


def _assert_exprs(block_id):
    data = load_yaml(GRC_DIR / f"{block_id}.block.yml")
    return [re.fullmatch(r"\$\{\s*(.*?)\s*\}", a).group(1) for a in data["asserts"]]


@pytest.mark.parametrize("block_id", [L, S, D])
def test_every_assert_has_a_bad_value_case(block_id):
    covered = [expr for bid, expr, _, _ in ASSERT_CASES if bid == block_id]
    assert sorted(covered) == sorted(_assert_exprs(block_id))


def _case_id(case):
    bid, expr, _, _ = case
    return f"{bid[len('coherer_'):]}:{expr[:40]}"


def _assertion_messages(block):
    return [msg for _, msg in block.iter_error_messages() if msg.startswith("Assertion")]


def _python_kwargs(block_id, params):
    """Constructor keyword arguments from GRC code strings (evaluated the way GRC does)."""
    return {k: eval(v, {}) for k, v in params.items()}     # noqa: S307 (fixed test strings)


@pytest.mark.parametrize("case", ASSERT_CASES, ids=_case_id)
def test_assert_rejects_bad_value_in_grc(platform_load, case):
    platform, _ = platform_load
    block_id, expr, bad, _ = case
    for override in bad:
        _, block = make_flowgraph(platform, block_id, {**BASE[block_id], **override})
        messages = _assertion_messages(block)
        assert (f'Assertion "{expr}" failed.' in messages
                or f'Assertion "{expr}" did not evaluate.' in messages), (override, messages)


@pytest.mark.parametrize("case", ASSERT_CASES, ids=_case_id)
def test_constructor_rejects_the_same_bad_value(case):
    block_id, _, bad, _ = case
    cls = getattr(coherer, block_id[len("coherer_"):])
    for override in bad:
        with pytest.raises(ValueError):
            cls(**_python_kwargs(block_id, {**BASE[block_id], **override}))


@pytest.mark.parametrize("case", [c for c in ASSERT_CASES if c[3]], ids=_case_id)
def test_edge_values_accepted_by_grc_and_constructor(platform_load, case):
    platform, _ = platform_load
    block_id, _, _, edges = case
    cls = getattr(coherer, block_id[len("coherer_"):])
    for override in edges:
        params = {**BASE[block_id], **override}
        _, block = make_flowgraph(platform, block_id, params)
        assert _assertion_messages(block) == [], override
        cls(**_python_kwargs(block_id, params))


@pytest.mark.parametrize("block_id", [L, S, D])
def test_default_parameters_pass_validation(platform_load, block_id):
    platform, _ = platform_load
    _, block = make_flowgraph(platform, block_id, {"sample_rate": "48000"})
    params_errors = [m for _, m in block.iter_error_messages() if "Port is not connected" not in m]
    assert params_errors == []


def test_grcc_reports_a_failed_assert(tmp_path, source_shim):
    """End to end: grcc refuses a flowgraph whose loop bandwidth exceeds 0.1 * sample_rate."""
    data = load_yaml(EXAMPLES / "qpsk_doppler_headless.grc")
    loop = next(b for b in data["blocks"] if b["id"] == "coherer_mth_power_loop_cc")
    loop["parameters"]["noise_bw_hz"] = "0.2 * samp_rate"
    bad = tmp_path / "bad_bandwidth.grc"
    bad.write_text(yaml.safe_dump(data, sort_keys=False))
    proc = subprocess.run(["grcc", "-o", str(tmp_path), str(bad)], capture_output=True, text=True,
                          env=grc_env(GRC_DIR, source_shim, tmp_path), timeout=RUN_TIMEOUT_S)
    assert proc.returncode != 0
    assert 'Assertion "noise_bw_hz <= 0.1 * sample_rate" failed.' in proc.stdout + proc.stderr


# --- example flowgraphs -------------------------------------------------------------------

def test_examples_directory_has_the_four_examples():
    names = {p.name for p in EXAMPLES.iterdir()}
    assert {"qpsk_doppler_headless.grc", "qpsk_loop_qt_gui.grc", "live_soapy_receiver.grc",
            "scripted_headless_chain.py"} <= names


@pytest.mark.parametrize("path", EXAMPLE_GRC, ids=lambda p: p.name)
def test_example_has_a_description(path):
    params = load_yaml(path)["options"]["parameters"]
    assert params["title"] and len(params["description"]) > 80


@pytest.fixture(scope="module")
def compiled_examples(tmp_path_factory, source_shim):
    """grcc output for every example, with only the repository's YAML on GRC_BLOCKS_PATH."""
    out = tmp_path_factory.mktemp("grcc_out")
    env = grc_env(GRC_DIR, source_shim, out)
    return {p.name: compile_grc(p, out, env) for p in EXAMPLE_GRC}, env, out


@pytest.mark.parametrize("path", EXAMPLE_GRC, ids=lambda p: p.name)
def test_grcc_compiles_example(compiled_examples, path):
    results, _, _ = compiled_examples
    script, _ = results[path.name]
    assert script.is_file()


@pytest.mark.parametrize("path", EXAMPLE_GRC, ids=lambda p: p.name)
def test_grcc_used_only_repository_yaml(compiled_examples, path):
    results, _, _ = compiled_examples
    _, output = results[path.name]
    dirs = searched_block_dirs(output)
    assert str(GRC_DIR) in dirs
    assert [d for d in dirs if d != str(GRC_DIR) and coherer_yaml_in(d)] == []


def _generate_option(path):
    return load_yaml(path)["options"]["parameters"]["generate_options"]


HEADLESS = [p for p in EXAMPLE_GRC if _generate_option(p) == "no_gui"]
GUI = [p for p in EXAMPLE_GRC if _generate_option(p) == "qt_gui"]


def test_there_are_headless_and_gui_examples():
    assert HEADLESS and GUI and len(HEADLESS) + len(GUI) == len(EXAMPLE_GRC)


@pytest.mark.parametrize("path", GUI, ids=lambda p: p.name)
def test_generated_gui_script_imports(compiled_examples, path):
    results, env, _ = compiled_examples
    script, _ = results[path.name]
    import_generated(script, env, flowgraph_id(path))


def test_live_example_uses_soapy_source_and_tuning_options(compiled_examples):
    results, env, _ = compiled_examples
    script, _ = results["live_soapy_receiver.grc"]
    ids = [b["id"] for b in load_yaml(EXAMPLES / "live_soapy_receiver.grc")["blocks"]]
    assert "soapy_custom_source" in ids
    options = import_generated(script, env, "live_soapy_receiver",
                               ["--driver", "hackrf", "--center-freq", "145.9e6"])
    assert options["driver"] == "hackrf" and options["center_freq"] == 145.9e6
    assert {"dev_args", "antenna", "ppm", "power", "hw_rate"} <= set(options)


# The headless scenario (qpsk_doppler_headless.grc): QPSK, M = 4, 1.5 s at 100 ksps,
# offset 3.7 kHz drifting at -250 Hz/s, Es/N0 15 dB, 3rd-order loop with B_L = 100 Hz,
# lock-detector window 1024, status every 25000 samples.
SCEN_FS = 100e3
SCEN_N = 150000
SCEN_F0 = 3700.0
SCEN_RATE = -250.0
SCEN_ESN0_DB = 15.0
SCEN_BL = 100.0
SCEN_M = 4
SCEN_WINDOW = 1024
SCEN_STATUS = 25000


def test_headless_scenario_constants_match_the_flowgraph():
    blocks = {b["name"]: b["parameters"] for b in load_yaml(EXAMPLES / "qpsk_doppler_headless.grc")["blocks"]}
    values = {k: eval(blocks[k]["value"]) for k in  # noqa: S307 (the example's own literals)
              ("samp_rate", "carrier_offset_hz", "doppler_rate_hz_s", "esn0_db", "noise_bw_hz", "duration_s")}
    assert values == {"samp_rate": SCEN_FS, "carrier_offset_hz": SCEN_F0, "doppler_rate_hz_s": SCEN_RATE,
                      "esn0_db": SCEN_ESN0_DB, "noise_bw_hz": SCEN_BL, "duration_s": SCEN_N / SCEN_FS}
    assert blocks["loop"]["power"] == str(SCEN_M) and blocks["lock_detector"]["window"] == str(SCEN_WINDOW)


def run_headless(script, env, workdir):
    """Run the generated headless script; returns (printed text, NCO frequency array in Hz)."""
    freq_file = pathlib.Path(workdir) / "nco_freq.f32"
    proc = subprocess.run([sys.executable, str(script), "--freq-file", str(freq_file)], env=env,
                          cwd=str(workdir), capture_output=True, text=True, timeout=RUN_TIMEOUT_S)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-3000:]
    return proc.stdout + proc.stderr, np.fromfile(freq_file, dtype=np.float32)


@pytest.fixture(scope="module")
def headless_run(compiled_examples, tmp_path_factory):
    results, env, _ = compiled_examples
    script, _ = results["qpsk_doppler_headless.grc"]
    return run_headless(script, env, tmp_path_factory.mktemp("headless_run"))


def check_headless_lock_tags(text):
    tags = parse_lock_tags(text)
    assert tags, "no carrier_lock tag printed"
    offset, locked = tags[0]
    assert locked and offset % SCEN_WINDOW == 0
    # At Es/N0 15 dB the locked metric is ~0.88 against an unlock threshold of
    # Qinv(1e-2)/sqrt(2*1024) = 0.051 (REFERENCES 7.2): no unlock is expected.
    assert [t for t in tags if not t[1]] == []


def check_headless_status(text):
    status = parse_status_prints(text)
    # one message per interval sample 0, 25000, ..., 125000 (the last incomplete window, past
    # 146 * 1024 = 149504, is never released) and one per lock change, merged when they coincide
    intervals = set(range(0, SCEN_WINDOW * (SCEN_N // SCEN_WINDOW), SCEN_STATUS))
    changes = {offset for offset, _ in parse_lock_tags(text)}
    assert sorted(int(s["sample"]) for s in status) == sorted(intervals | changes)
    first_lock = min(changes)
    after = [s for s in status if s["sample"] >= first_lock]
    assert all(s["locked"] for s in after) and not any(s["locked"] for s in status if s["sample"] < first_lock)
    assert len(after) >= 3
    # M2M4 Es/N0 over N = 1024: normalised std ~0.05 -> ~0.2 dB per window, bias +0.03 dB
    # (REFERENCES 8, Monte Carlo table); 1 dB is 5 sigma for one window.
    assert all(abs(s["esn0_db"] - SCEN_ESN0_DB) < 1.0 for s in after)
    # no rx_time tag in a simulation: time_s = sample / sample_rate (design contract)
    assert all(abs(s["time_s"] - s["sample"] / SCEN_FS) < 1e-6 * max(1.0, s["time_s"]) for s in status)


def squaring_noise(power, esn0):
    """V_M = sum_k C(M,k)^2 k! s2^k, s2 = 1/(Es/N0) (REFERENCES 4, derived there and checked
    against the Lindsey & Simon closed forms for M = 2, 4)."""
    s2 = 1.0 / esn0
    return sum(comb(power, k) ** 2 * factorial(k) * s2 ** k for k in range(1, power + 1))


def check_headless_frequency(freq):
    assert len(freq) == SCEN_N
    # Compare the NCO frequency averaged over the last 0.2 s with the true offset
    # (offset + ramp, the flowgraph's own profile) averaged over the same samples.
    n_avg = 20000
    true = SCEN_F0 + SCEN_RATE * np.arange(SCEN_N) / SCEN_FS
    error = float(np.mean(freq[-n_avg:].astype(np.float64)) - np.mean(true[-n_avg:]))
    # Tolerance from linear loop theory (REFERENCES 4): over N samples the register's mean
    # differs from the true mean by (phi_end - phi_start)/N plus K1 * mean(e), where
    #   var(phi) = B_L T V_M / M^2, and e (normalised detector output) has variance V_M / 2
    #   per sample, with proportional gain K1 = g K1 / M <= 4 B_L T / M for orders 1-3.
    # A 3rd-order loop has no steady-state error to a ramp, so the mean error is ~0.
    esn0 = 10.0 ** (SCEN_ESN0_DB / 10.0)
    bt = SCEN_BL / SCEN_FS
    v_m = squaring_noise(SCEN_M, esn0)
    to_hz = SCEN_FS / (2.0 * math.pi)
    sigma_phi_term = math.sqrt(2.0 * bt * v_m) / SCEN_M / n_avg * to_hz
    sigma_k1_term = 4.0 * bt / SCEN_M * math.sqrt(v_m / (2.0 * n_avg)) * to_hz
    sigma = math.hypot(sigma_phi_term, sigma_k1_term)        # about 0.06 Hz here
    assert abs(error) < 6.0 * sigma, (error, sigma)


def test_headless_example_prints_lock_tags(headless_run):
    text, _ = headless_run
    check_headless_lock_tags(text)


def test_headless_example_prints_status_messages(headless_run):
    text, _ = headless_run
    check_headless_status(text)


def test_headless_example_writes_frequency_near_offset(headless_run):
    _, freq = headless_run
    check_headless_frequency(freq)


# --- scripted example ---------------------------------------------------------------------

@pytest.fixture(scope="module")
def scripted_run(source_shim, tmp_path_factory):
    work = tmp_path_factory.mktemp("scripted")
    proc = subprocess.run([sys.executable, str(EXAMPLES / "scripted_headless_chain.py")],
                          env=grc_env(GRC_DIR, source_shim, work), cwd=str(work), capture_output=True,
                          text=True, timeout=RUN_TIMEOUT_S)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-3000:]
    return proc.stdout


def test_scripted_example_reports_lock_after_signal_appears(scripted_run):
    events = re.findall(r"lock event: sample (\d+) t=\S+ s (LOCKED|UNLOCKED)", scripted_run)
    assert events and events[0][1] == "LOCKED"
    # the signal starts at 0.2 s (10000 samples at 50 ksps); noise alone must not lock
    assert int(events[0][0]) >= 10000 - 1024


def test_scripted_example_reads_status_messages(scripted_run):
    rows = re.findall(r"status: t=(\S+) s locked=(True|False) metric=(\S+) esn0_db=(\S+) freq_hz=(\S+)",
                      scripted_run)
    assert len(rows) >= 10
    locked_metrics = [float(m) for t, lk, m, _, _ in rows if lk == "True" and float(t) >= 0.4]
    # c_8 at Es/N0 20 dB = 0.85153 (REFERENCES 7.1 table; formula from memory there, checked by
    # numerical integration and Monte Carlo). Per-window std <= sqrt((1 - c_8^2) / 1024) = 0.016;
    # the mean of >= 10 windows has std <= 0.005, so 0.025 is 5 sigma.
    assert len(locked_metrics) >= 10
    assert abs(np.mean(locked_metrics) - 0.85153) < 0.025


def test_scripted_example_final_frequency(scripted_run):
    m = re.search(r"final NCO frequency: (\S+) Hz \(scenario offset (\S+) Hz\)", scripted_run)
    assert m
    # One reading of a 2nd-order loop's frequency register. Continuous approximation (B_L T << 1):
    # register = theta * K2 s / (s^2 + K1 s + K2), input phase noise density T V_M / M^2 rad^2/Hz
    # (so that its variance in B_L is B_L T V_M / M^2, REFERENCES 4), and
    # int_0^inf w^2 / ((wn^2 - w^2)^2 + 4 zeta^2 wn^2 w^2) dw = pi / (4 zeta wn) give
    # var(f) = (T V_M / M^2) wn^3 / (8 zeta) / (2 pi)^2, wn = 2 B_L / (zeta + 1/(4 zeta)) [derived].
    fs, power, esn0, b_l, zeta = 50e3, 8, 100.0, 40.0, 0.707      # the script's defaults
    wn = 2.0 * b_l / (zeta + 0.25 / zeta)
    sigma_hz = math.sqrt(squaring_noise(power, esn0) / fs / power ** 2 * wn ** 3 / (8.0 * zeta)) / (2 * math.pi)
    assert abs(float(m.group(1)) - float(m.group(2))) < 6.0 * sigma_hz + 0.01   # 0.01: printed to 2 decimals
