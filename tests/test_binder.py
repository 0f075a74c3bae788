"""binder/ stays consistent with pyproject.toml: same packages, same ranges, torch as a CPU build."""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

from packaging.requirements import Requirement
from packaging.utils import canonicalize_name
from packaging.version import Version

ROOT = Path(__file__).resolve().parents[1]


def project_requirements() -> dict[str, Requirement]:
    meta = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    reqs = [Requirement(r) for r in meta["dependencies"]]
    extras = meta["optional-dependencies"]

    def expand(name):
        for r in map(Requirement, extras[name]):
            if canonicalize_name(r.name) == "attnscope":
                for e in r.extras:
                    yield from expand(e)
            else:
                yield r

    reqs += list(expand("examples"))
    return {canonicalize_name(r.name): r for r in reqs}


def binder_requirements() -> dict[str, Requirement]:
    lines = (ROOT / "binder" / "requirements.txt").read_text().splitlines()
    reqs = [Requirement(line) for line in lines if line.strip() and not re.match(r"\s*(#|-)", line)]
    return {canonicalize_name(r.name): r for r in reqs}


def test_binder_lists_the_same_packages_as_pyproject():
    assert set(binder_requirements()) == set(project_requirements())


def test_binder_ranges_equal_pyproject_except_torch():
    proj, binder = project_requirements(), binder_requirements()
    for name, req in proj.items():
        if name != "torch":
            assert str(binder[name].specifier) == str(req.specifier), name


def test_binder_torch_is_the_cpu_build_inside_the_project_range():
    torch_req = binder_requirements()["torch"]
    (spec,) = list(torch_req.specifier)
    assert spec.operator == "==" and spec.version.endswith("+cpu")
    assert Version(spec.version) in project_requirements()["torch"].specifier
    assert "--extra-index-url https://download.pytorch.org/whl/cpu" in (ROOT / "binder" / "requirements.txt").read_text()


def test_postbuild_installs_the_package_without_pulling_torch_again():
    text = (ROOT / "binder" / "postBuild").read_text()
    assert "pip install --no-deps -e ." in text
