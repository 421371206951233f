"""Which x86-64 instruction set extensions the kernels compiled ahead of time use.

The extension ``livematch.core._aot_kernels`` is numba's code compiled by ``numba.pycc``
for ``livematch._aot_build.TARGET_CPU``. Built for the generic x86-64 CPU it must hold
only baseline x86-64 instructions (SSE2), so a wheel or an image built on one machine
runs on any x86-64 server; built for the host (``host``) it may hold AVX and later,
which an older CPU cannot run (the process dies with SIGILL on the first such kernel).
This script disassembles the extension with binutils' ``objdump -d`` and counts the
instructions of each extension group beyond the baseline, so the claim in the README is
a reading anyone can repeat, not an assumption.

Groups (mnemonics as GNU objdump prints them, AT&T syntax; the lists are from the
Intel 64 and IA-32 Architectures Software Developer's Manual, vol. 2, and the x86-64
psABI's micro-architecture levels v2 / v3: from memory, not exhaustive):

- ``avx+``: VEX or EVEX encoded (a ``v`` mnemonic on xmm / ymm / zmm registers) or any
  ymm / zmm / k-mask register: AVX, AVX2, FMA, AVX-512 (level v3 and above);
- ``sse3-4.2``: SSE3, SSSE3, SSE4.1, SSE4.2 instructions (level v2);
- ``bit``: POPCNT (v2), LZCNT, TZCNT, BMI1 / BMI2, MOVBE (v3).

Usage: ``python bench/kernelisa.py [EXTENSION.so ...] [--out FILE.md]`` (default: the
extension next to the installed ``livematch.core`` package).
"""

from __future__ import annotations

import argparse
import re
import shutil
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

SSE3_42 = frozenset((
    "addsubpd", "addsubps", "haddpd", "haddps", "hsubpd", "hsubps", "lddqu",
    "movddup", "movshdup", "movsldup", "pabsb", "pabsd", "pabsw", "palignr",
    "phaddd", "phaddsw", "phaddw", "phsubd", "phsubsw", "phsubw", "pmaddubsw",
    "pmulhrsw", "pshufb", "psignb", "psignd", "psignw", "blendpd", "blendps",
    "blendvpd", "blendvps", "dppd", "dpps", "extractps", "insertps", "movntdqa",
    "mpsadbw", "packusdw", "pblendvb", "pblendw", "pcmpeqq", "pextrb", "pextrd",
    "pextrq", "phminposuw", "pinsrb", "pinsrd", "pinsrq", "pmaxsb", "pmaxsd",
    "pmaxud", "pmaxuw", "pminsb", "pminsd", "pminud", "pminuw", "pmovsxbd",
    "pmovsxbq", "pmovsxbw", "pmovsxdq", "pmovsxwd", "pmovsxwq", "pmovzxbd",
    "pmovzxbq", "pmovzxbw", "pmovzxdq", "pmovzxwd", "pmovzxwq", "pmuldq", "pmulld",
    "ptest", "roundpd", "roundps", "roundsd", "roundss", "crc32", "pcmpestri",
    "pcmpestrm", "pcmpgtq", "pcmpistri", "pcmpistrm",
))
BIT = frozenset((
    "popcnt", "lzcnt", "tzcnt", "andn", "bextr", "blsi", "blsmsk", "blsr", "bzhi",
    "mulx", "pdep", "pext", "rorx", "sarx", "shlx", "shrx", "movbe",
))
WIDE_REGISTER = re.compile(r"%(ymm|zmm)\d+|%k[0-7]\b")


def group(mnemonic: str, operands: str) -> str | None:
    """The extension group of one instruction, or None for the x86-64 baseline."""
    base = mnemonic.rstrip("bwlq") if mnemonic.rstrip("bwlq") in BIT else mnemonic
    if WIDE_REGISTER.search(operands) or (mnemonic.startswith("v") and "%xmm" in operands):
        return "avx+"
    if mnemonic in SSE3_42:
        return "sse3-4.2"
    if base in BIT:
        return "bit"
    return None


def count(path: Path) -> tuple[int, Counter[str]]:
    """Instructions in ``path`` and the count of each extension group among them."""
    text = subprocess.run(["objdump", "-d", "--no-show-raw-insn", str(path)],
                          check=True, capture_output=True, text=True).stdout
    total, groups = 0, Counter[str]()
    for line in text.splitlines():
        head, tab, rest = line.partition(":\t")
        if not tab or not head.strip() or not all(c in "0123456789abcdef" for c in
                                                   head.strip()):
            continue
        mnemonic, _, operands = rest.strip().partition(" ")
        total += 1
        g = group(mnemonic, operands)
        if g is not None:
            groups[g] += 1
    return total, groups


def default_paths() -> list[Path]:
    """The kernels extension beside the importable ``livematch.core`` package."""
    import livematch.core

    return sorted(Path(livematch.core.__file__).parent.glob("_aot_kernels*.so"))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("paths", nargs="*", type=Path)
    parser.add_argument("--out", type=Path, help="write the table to this file too")
    args = parser.parse_args(argv)
    if shutil.which("objdump") is None:
        print("objdump not found (Debian: apt-get install binutils)", file=sys.stderr)
        return 2
    paths = args.paths or default_paths()
    if not paths:
        print("no kernels extension found (python -m livematch._aot_build)", file=sys.stderr)
        return 2
    lines = ["# x86-64 extensions in the kernels compiled ahead of time", "",
             f"Command: `bench/kernelisa.py {' '.join(str(p) for p in args.paths)}`, "
             f"{time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}.", "",
             "| extension file | instructions | avx+ | sse3-4.2 | bit |",
             "|---|---:|---:|---:|---:|"]
    for path in paths:
        total, groups = count(path)
        lines.append(f"| `{path}` | {total:,} | {groups['avx+']:,} | "
                     f"{groups['sse3-4.2']:,} | {groups['bit']:,} |")
    text = "\n".join(lines) + "\n"
    print(text, end="")
    if args.out:
        args.out.write_text(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
