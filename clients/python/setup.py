"""Generates the gRPC stubs from proto/probity/v1/*.proto into probity_client/v1/ while the package is built.

The proto folder is ../../proto beside this package in the probity repository, or PROBITY_PROTO. The generated
modules import each other as `probity.v1`; they are rewritten to `probity_client.v1` so the package owns them.
"""

import os
import re
import tempfile
from pathlib import Path

from setuptools import setup
from setuptools.command.build_py import build_py


def generate(out_pkg: Path) -> None:
    from grpc_tools import protoc

    here = Path(__file__).resolve().parent
    proto = Path(os.environ.get("PROBITY_PROTO", here.parent.parent / "proto")).resolve()
    sources = sorted(str(p.relative_to(proto)) for p in (proto / "probity" / "v1").glob("*.proto"))
    if not sources:
        raise SystemExit(f"no .proto files under {proto}/probity/v1 (set PROBITY_PROTO)")
    include = Path(protoc.__file__).parent / "_proto"
    with tempfile.TemporaryDirectory() as tmp:
        args = ["protoc", f"-I{proto}", f"-I{include}", f"--python_out={tmp}", f"--grpc_python_out={tmp}", *sources]
        if protoc.main(args) != 0:
            raise SystemExit("protoc failed")
        out_pkg.mkdir(parents=True, exist_ok=True)
        (out_pkg / "__init__.py").write_text('"""Generated from proto/probity/v1 at build time."""\n')
        for f in sorted((Path(tmp) / "probity" / "v1").glob("*.py")):
            text = re.sub(r"\bfrom probity\.v1 import\b", "from probity_client.v1 import", f.read_text())
            (out_pkg / f.name).write_text(text)


class BuildWithStubs(build_py):
    def run(self):
        super().run()
        generate(Path(self.build_lib) / "probity_client" / "v1")


setup(cmdclass={"build_py": BuildWithStubs})
