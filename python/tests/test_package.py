"""The Python package against the command it wraps.

These run against the installed wheel (`.ci/run` builds it, installs it in a
clean venv and runs pytest from this folder). Each check compares the
package's result with the `shunt` command's own output on the same fixture,
or with a fact of the fixture that the Rust tests establish independently
(the demo's planted defects are listed in fixtures/MANIFEST.txt).
"""

import json
import shutil
import subprocess
import sys

import numpy as np
import pytest

import shunt


def cli_json(*args):
    """The document the installed `shunt` command writes for ARGS."""
    exe = shutil.which("shunt")
    assert exe, "the package installs a `shunt` command on the PATH"
    out = subprocess.run([exe, *map(str, args), "--format", "json"], capture_output=True, text=True)
    assert out.returncode in (0, 1), out.stderr
    return json.loads(out.stdout)


def test_version_matches_the_command():
    exe = shutil.which("shunt")
    out = subprocess.run([exe, "--version"], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == f"shunt {shunt.__version__}"


def test_scan_is_the_commands_document(fixtures):
    model = fixtures / "torch" / "resnet_cifar_bn.onnx"
    doc = shunt.scan(model)
    assert doc["schema"] == "shunt/report"
    assert len(doc["blocks"]) == 6
    assert doc == cli_json("scan", model)


def test_audit_of_the_demo_finds_its_planted_defects(fixtures):
    # fixtures/MANIFEST.txt: the demo's defects are a lost shortcut in stage 1,
    # a dead branch (all-zero conv2) in stage 2 and a branch scaled x40 in stage 3.
    doc = shunt.audit(fixtures / "demo" / "tile_grader.onnx")
    assert doc["schema"] == "shunt/report" and doc["command"] == "audit"
    codes = {f["code"] for f in doc["findings"]}
    assert {"lost-shortcut", "dead", "dominant"} <= codes, codes
    assert doc == cli_json("audit", fixtures / "demo" / "tile_grader.onnx")


def test_numpy_inputs_are_the_same_as_a_feed_file(fixtures, tmp_path):
    model = fixtures / "torch" / "resnet_cifar_bn.onnx"
    x = np.random.default_rng(7).standard_normal((4, 3, 32, 32)).astype(np.float32)
    from_array = shunt.audit(model, inputs=x)
    from_mapping = shunt.audit(model, inputs={"input": x})
    np.save(tmp_path / "x.npy", x)
    from_file = cli_json("audit", model, "--feed", tmp_path / "x.npy")
    ratios = [b["stats"]["ratio"]["mean"] for b in from_array["blocks"]]
    assert len(ratios) == 6
    assert ratios == [b["stats"]["ratio"]["mean"] for b in from_mapping["blocks"]]
    assert ratios == [b["stats"]["ratio"]["mean"] for b in from_file["blocks"]]
    # The inputs differ from the seeded ones, so the statistics do too.
    seeded = shunt.audit(model)
    assert ratios != [b["stats"]["ratio"]["mean"] for b in seeded["blocks"]]


def test_bad_input_raises_with_the_commands_message(tmp_path):
    bad = tmp_path / "not_a_model.onnx"
    bad.write_bytes(b"\x08\x07 definitely not protobuf \xff\xff\xff")
    with pytest.raises(shunt.ShuntError) as caught:
        shunt.scan(bad)
    message = str(caught.value)
    assert str(bad) in message and "\n" not in message
    assert not caught.value.internal
    exe = shutil.which("shunt")
    out = subprocess.run([exe, "scan", str(bad)], capture_output=True, text=True)
    assert out.returncode == 2
    assert out.stderr.strip() == f"shunt: error: {message}"


def test_an_unknown_option_raises(fixtures):
    with pytest.raises(shunt.ShuntError, match="--no-such-option"):
        shunt.audit(fixtures / "plain_cnn.onnx", options=["--no-such-option"])


def test_pin_and_verify(fixtures, tmp_path):
    model = fixtures / "torch" / "resnet_cifar_bn.onnx"
    text = shunt.pin(model, tmp_path / "pin.toml")
    assert (tmp_path / "pin.toml").read_text() == text
    ok = shunt.verify(model, pin=tmp_path / "pin.toml")
    assert ok["schema"] == "shunt/verify" and ok["differences"] == []
    # A plain network has none of the pinned blocks: a gate built on verify fails.
    other = shunt.verify(fixtures / "plain_cnn.onnx", pin=tmp_path / "pin.toml")
    assert other["differences"], other
    assert shunt.run("verify", fixtures / "plain_cnn.onnx", "--pin", tmp_path / "pin.toml") == 1
    with pytest.raises(ValueError):
        shunt.verify(model)


def test_compare_after_quantising(fixtures):
    doc = shunt.compare(
        fixtures / "torch" / "resnet_cifar_folded.onnx",
        fixtures / "transformed" / "resnet_cifar_qop.onnx",
    )
    assert doc["schema"] == "shunt/compare"
    assert doc["structural_differences"] == 0
    assert len(doc["blocks"]) == 6


def test_run_gives_exit_codes(fixtures, capfd):
    assert shunt.run("scan", fixtures / "plain_cnn.onnx") == 0
    assert "plain network" in capfd.readouterr().out
    assert shunt.run("audit", fixtures / "rezero.onnx", "--fail-on", "dead") == 1
    assert shunt.run("scan", fixtures / "no_such_file.onnx") == 2


def test_the_module_runs_as_a_command():
    out = subprocess.run(
        [sys.executable, "-m", "shunt._cli", "--version"], capture_output=True, text=True
    )
    assert out.returncode == 0 and out.stdout.startswith("shunt ")
