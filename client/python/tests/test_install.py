"""The package installs like a library: pip builds it from pyproject.toml
with setuptools alone, offline, into a fresh virtual environment that sees
the system's grpcio, protobuf and numpy, and the installed copy imports
and works outside the source tree.

This is the Debian way the README gives: ``python3 -m venv
--system-site-packages`` and ``pip install --no-index --no-build-isolation``
(no package index is reachable, and Debian's pip refuses to install into
the system interpreter's own site-packages, PEP 668). ``--no-index`` makes
pip resolve the declared dependencies (grpcio, protobuf, numpy) from what
is installed: a requirement the system cannot meet fails the install
instead of reaching for a network.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
import textwrap
import unittest
from pathlib import Path

#: client/python, the project directory that holds pyproject.toml.
PROJECT = Path(__file__).resolve().parent.parent

#: Bound on each pip or interpreter call (2 cores shared: generous).
CALL_TIMEOUT_SECONDS = 300


def _run(args: "list[str]", cwd: Path) -> str:
    env = dict(os.environ)
    env.pop("PYTHONPATH", None)  # the installed copy, not the source tree, must be found
    env["PIP_DISABLE_PIP_VERSION_CHECK"] = "1"
    env["PYTHONDONTWRITEBYTECODE"] = "1"
    proc = subprocess.run(
        args, cwd=cwd, env=env, capture_output=True, text=True, timeout=CALL_TIMEOUT_SECONDS, check=False
    )
    if proc.returncode != 0:
        raise AssertionError(f"{' '.join(args)} exited {proc.returncode}\n{proc.stdout}\n{proc.stderr}")
    return proc.stdout


#: Run by the installed interpreter from an empty directory: imports the
#: package, checks where it came from and what pip recorded, and encodes a
#: Register frame (which exercises the generated message classes).
PROBE = textwrap.dedent(
    """
    import re
    import sys
    from importlib import metadata
    import numpy as np
    import sluice_client as sc
    where = sc.__file__
    assert where.startswith(sys.argv[1]), (where, sys.argv[1])
    dist = metadata.distribution("sluice-client")
    reqs = sorted(re.match(r"[A-Za-z0-9_.-]+", r).group(0) for r in dist.requires or [])
    assert reqs == ["grpcio", "numpy", "protobuf"], reqs
    spec = sc.Spec(dim=2, chains=3, start=np.zeros(2), step=0.1, names=["a", "b"])
    reg = spec.to_register()
    assert reg.dim == 2 and reg.chains == 3 and list(reg.names) == ["a", "b"], reg
    print("installed", dist.version, where)
    """
)


class InstallTests(unittest.TestCase):
    """pip install (plain and editable) into a temporary environment."""

    def setUp(self) -> None:
        self.tmp = Path(tempfile.mkdtemp(prefix="sluice-client-install-"))
        self.addCleanup(shutil.rmtree, self.tmp, True)
        # Build from a copy: setuptools writes build/ and *.egg-info beside
        # pyproject.toml, which must not land in the source tree.
        self.src = self.tmp / "src"
        self.src.mkdir()
        for name in ("pyproject.toml", "README.md"):
            shutil.copy2(PROJECT / name, self.src / name)
        shutil.copytree(
            PROJECT / "sluice_client", self.src / "sluice_client", ignore=shutil.ignore_patterns("__pycache__")
        )
        self.venv = self.tmp / "venv"
        _run([sys.executable, "-m", "venv", "--system-site-packages", str(self.venv)], self.tmp)
        self.python = str(self.venv / "bin" / "python")
        self.empty = self.tmp / "elsewhere"
        self.empty.mkdir()

    def pip_install(self, *extra: str) -> None:
        _run(
            [self.python, "-m", "pip", "install", "--no-index", "--no-build-isolation", *extra, str(self.src)],
            self.tmp,
        )

    def test_install(self) -> None:
        self.pip_install()
        site = _run([self.python, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"], self.empty)
        out = _run([self.python, "-c", PROBE, site.strip()], self.empty)
        self.assertIn("installed 0.1.0", out)
        # The generated classes and the type information are installed too.
        pkg = Path(site.strip()) / "sluice_client"
        for rel in ("py.typed", "_proto/sluice/v1/sluice_pb2.py", "_proto/sluice/v1/sluice_pb2.pyi",
                    "_proto/sluice_client_rpc_pb2.py"):
            self.assertTrue((pkg / rel).is_file(), rel)

    def test_editable_install(self) -> None:
        self.pip_install("-e")
        out = _run([self.python, "-c", PROBE, str(self.src)], self.empty)
        self.assertIn("installed 0.1.0", out)


if __name__ == "__main__":
    unittest.main()
