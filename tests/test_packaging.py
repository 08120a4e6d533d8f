"""The installed distribution: every subpackage imports under one namespace, package data included."""

import importlib
import importlib.resources
import shutil
import subprocess
import sys

import pytest

SUBPACKAGES = ["buswitness", "buswitness.capture", "buswitness.decode", "buswitness.analysis", "buswitness.cli",
               "buswitness.simulate", "buswitness.errors", "buswitness.fsutil", "buswitness.records", "buswitness.serial",
               "buswitness.protocols", "buswitness.detect", "buswitness.decode.protocols",
               "buswitness.decode.protocols.profibus_dp"]


@pytest.mark.parametrize("name", SUBPACKAGES)
def test_subpackage_imports_from_the_installed_distribution(name):
    importlib.import_module(name)


def test_no_generic_top_level_names_are_claimed():
    # installing must not shadow other distributions' "decode" or "capture" packages
    for generic in ("decode", "capture", "analysis", "cli", "simulate", "core"):
        spec = importlib.util.find_spec(generic)
        assert spec is None or "buswitness" not in str(spec.origin or "")


def test_console_script_is_installed():
    exe = shutil.which("buswitness") or str(__import__("pathlib").Path(sys.executable).parent / "buswitness")
    out = subprocess.run([exe, "--version"], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0 and out.stdout.startswith("buswitness")


def test_the_vendored_plotly_bundle_and_its_licence_are_installed_with_the_templates():
    vendor = importlib.resources.files("buswitness.analysis.templates").joinpath("vendor")
    for name in ("plotly-cartesian.min.js", "plotly-cartesian.LICENSE", "README.md"):
        assert vendor.joinpath(name).is_file(), name
