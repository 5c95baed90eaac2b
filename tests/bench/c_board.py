"""Benchmark of the C board side (protocol/c/): receive-path fuzz, Cortex-M4 size, host timing.

Prints figures, no pass/fail: ``python tests/bench/c_board.py [--json] [--fuzz N] [--rounds N]``.

- fuzz: protocol/c/harness/fuzz.c built with -fsanitize=address,undefined (when the compiler
  supports them; said in the output otherwise) run over N random inputs (default 10^6): garbage,
  mutated frames, oversize runs, random type ids and versions, an overfilled ring. Any sanitizer
  report aborts the run and counts as a failure.
- size: the library built for Cortex-M4 with arm-none-eabi-gcc (-Os -mcpu=cortex-m4 -mthumb
  -mfloat-abi=hard -mfpu=fpv4-sp-d16 -ffunction-sections -fdata-sections), sizes from
  arm-none-eabi-size. flash_bytes = text + data of the library objects (everything compiled, no
  section dropped); ram_bytes = the library's own static data (none) plus the state a board
  allocates for the receive path and one transmit frame, measured as the static data of
  protocol/c/harness/example_board.c; the largest single stack frame from -fstack-usage; and the
  whole example linked with newlib-nano and --gc-sections. With no cross compiler, sizes are null
  and the output says how to install it.
- host time: protocol/c/harness/bench.c built with -O2: per round a 4-axis Telemetry frame is
  pushed into the ring, then tl_rx_poll (ring -> decoder -> decoded message) is timed with
  CLOCK_MONOTONIC; median and 99th percentile in microseconds.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import re
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from protocol.c import build  # noqa: E402

M4_FLAGS = ("-Os", "-mcpu=cortex-m4", "-mthumb", "-mfloat-abi=hard", "-mfpu=fpv4-sp-d16",
            "-ffunction-sections", "-fdata-sections")
CROSS_CC = "arm-none-eabi-gcc"
CROSS_SIZE = "arm-none-eabi-size"
INSTALL_HINT = "apt-get update && apt-get install -y gcc-arm-none-eabi libnewlib-arm-none-eabi"


def run_fuzz(n: int, seed: int) -> dict:
    ok, why = build.sanitizers_available()
    exe = build.build("program", [build.HARNESS_DIR / "fuzz.c"], sanitize=ok, optimize="-O1")
    t0 = time.perf_counter()
    res = subprocess.run([str(exe), str(n), str(seed)], capture_output=True, text=True)
    wall = time.perf_counter() - t0
    m = re.search(r"fuzz inputs=(\d+) failures=(\d+)(.*)", res.stdout)
    figures = dict(re.findall(r"(\w+)=(\d+)", m.group(3))) if m else {}
    if m:
        inputs, failures = int(m.group(1)), int(m.group(2))
    else:  # a sanitizer aborted the run: the report is on stderr
        inputs, failures = None, 1
    return {"fuzz_inputs": inputs, "fuzz_failures": failures, "fuzz_seed": seed,
            "fuzz_sanitized": ok, "fuzz_sanitizer_note": why, "fuzz_wall_s": round(wall, 2),
            "fuzz_exit": res.returncode,
            "fuzz_counts": {k: int(v) for k, v in figures.items()},
            "fuzz_stderr_tail": res.stderr.strip().splitlines()[-12:] if res.returncode else []}


def _sizes(out: str) -> dict[str, dict[str, int]]:
    """Berkeley-format arm-none-eabi-size output -> {file: {text, data, bss}}."""
    rows = {}
    for line in out.splitlines()[1:]:
        parts = line.split()
        if len(parts) >= 6 and parts[0].isdigit():
            rows[Path(parts[5]).name] = {"text": int(parts[0]), "data": int(parts[1]),
                                         "bss": int(parts[2])}
    return rows


def cortex_m4_sizes() -> dict:
    cc, size = shutil.which(CROSS_CC), shutil.which(CROSS_SIZE)
    if not cc or not size:
        print(f"no {CROSS_CC}/{CROSS_SIZE} on the PATH: sizes are null; install the cross "
              f"compiler with `{INSTALL_HINT}`", file=sys.stderr)
        return {"flash_bytes": None, "ram_bytes": None, "cross_compiler": None}
    version = subprocess.run([cc, "--version"], capture_output=True, text=True).stdout
    inc = [f"-I{build.C_DIR}", f"-I{build.GENERATED_DIR}"]
    with tempfile.TemporaryDirectory() as tmp:
        objs = []
        for src in [*build.library_sources(), build.HARNESS_DIR / "example_board.c"]:
            obj = Path(tmp) / (src.stem + ".o")
            subprocess.run([cc, *build.STRICT_FLAGS, *M4_FLAGS, "-fstack-usage", *inc, "-c",
                            str(src), "-o", str(obj)], check=True)
            objs.append(obj)
        rows = _sizes(subprocess.run([size, *map(str, objs)], capture_output=True, text=True,
                                     check=True).stdout)
        stack = []
        for su in Path(tmp).glob("*.su"):
            for line in su.read_text().splitlines():
                where, nbytes, _kind = line.rsplit("\t", 2)
                stack.append((int(nbytes), where.rsplit(":", 1)[-1]))
        elf = Path(tmp) / "example.elf"
        subprocess.run([cc, *build.STRICT_FLAGS, *M4_FLAGS, "-DTL_EXAMPLE_MAIN", *inc,
                        *map(str, build.library_sources()),
                        str(build.HARNESS_DIR / "example_board.c"), "--specs=nano.specs",
                        "--specs=nosys.specs", "-Wl,--gc-sections", "-o", str(elf)], check=True)
        linked = _sizes(subprocess.run([size, str(elf)], capture_output=True, text=True,
                                       check=True).stdout)["example.elf"]
    lib = {k: v for k, v in rows.items() if k != "example_board.o"}
    board = rows["example_board.o"]
    lib_flash = sum(r["text"] + r["data"] for r in lib.values())
    lib_ram = sum(r["data"] + r["bss"] for r in lib.values())
    state_ram = board["data"] + board["bss"]
    top = max(stack)
    return {"flash_bytes": lib_flash, "ram_bytes": lib_ram + state_ram,
            "library_static_ram_bytes": lib_ram, "board_state_ram_bytes": state_ram,
            "per_object": rows, "stack_largest_frame_bytes": top[0],
            "stack_largest_frame_function": top[1],
            "linked_example": {**linked, "note": "example_board.c + library + newlib-nano "
                               "startup, memcpy and memset, --gc-sections"},
            "cross_compiler": version.splitlines()[0] if version else CROSS_CC}


def host_timing(rounds: int) -> dict:
    exe = build.build("program", [build.HARNESS_DIR / "bench.c"], optimize="-O2")
    res = subprocess.run([str(exe), str(rounds)], capture_output=True, text=True, check=True)
    out = json.loads(res.stdout)
    cc = build.find_compiler()
    out["host_compiler"] = build.compiler_version(cc)
    out["host_cpu"] = platform.processor() or platform.machine()
    return out


def _load() -> float | None:
    try:
        return round(os.getloadavg()[0], 2)
    except (AttributeError, OSError):
        return None


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--json", action="store_true", help="print one JSON object")
    ap.add_argument("--fuzz", type=int, default=1_000_000, help="fuzz inputs (default 10^6)")
    ap.add_argument("--seed", type=int, default=1, help="fuzz seed (default 1)")
    ap.add_argument("--rounds", type=int, default=200_000,
                    help="timed decodes of a 4-axis telemetry frame (default 200000)")
    args = ap.parse_args(argv)
    if args.fuzz < 0 or args.rounds < 1:
        ap.error("--fuzz must be >= 0 and --rounds >= 1")
    result = {"load_average": _load()}
    result.update(run_fuzz(args.fuzz, args.seed))
    result.update(cortex_m4_sizes())
    result.update(host_timing(args.rounds))
    if args.json:
        print(json.dumps(result, indent=2))
        return 0
    san = "under ASan+UBSan" if result["fuzz_sanitized"] else (
        f"WITHOUT sanitizers ({result['fuzz_sanitizer_note']})")
    print(f"receive-path fuzz {san}: {result['fuzz_inputs']} inputs, "
          f"{result['fuzz_failures']} failures, {result['fuzz_wall_s']} s "
          f"(seed {result['fuzz_seed']}; {result['fuzz_counts']})")
    for line in result["fuzz_stderr_tail"]:
        print(f"  {line}")
    if result["flash_bytes"] is None:
        print("Cortex-M4 sizes: not measured (no cross compiler)")
    else:
        ex = result["linked_example"]
        print(f"Cortex-M4 (-Os, {result['cross_compiler']}): library flash "
              f"{result['flash_bytes']} B, static RAM {result['ram_bytes']} B (library "
              f"{result['library_static_ram_bytes']} B + receive/transmit state "
              f"{result['board_state_ram_bytes']} B); largest stack frame "
              f"{result['stack_largest_frame_bytes']} B "
              f"({result['stack_largest_frame_function']}); "
              f"linked example text {ex['text']} data {ex['data']} bss {ex['bss']}")
    print(f"host ({result['host_compiler']}, -O2), {result['frames']} rounds, load average "
          f"{result['load_average']}: decode of a 4-axis telemetry frame "
          f"({result['frame_bytes']} B) median {result['decode_us_median']:.3f} us, p99 "
          f"{result['decode_us_p99']:.3f} us; encode median {result['encode_us_median']:.3f} us")
    return 0


if __name__ == "__main__":
    sys.exit(main())
