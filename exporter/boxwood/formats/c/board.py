"""A Cortex-M4 board for the C target: build generated C for a microcontroller and run it
under QEMU.

The board is QEMU's ``mps2-an386`` machine (Arm MPS2 with the AN386 FPGA image: a
Cortex-M4 with the single-precision FPU). The project brings its own startup file
(:data:`STARTUP_C`: vector table, reset handler, FPU enable) and linker script
(:data:`LINKER_SCRIPT`); the C library is newlib (newlib-nano) and output goes through Arm
semihosting, which QEMU serves on the host's stdout. ``double`` arithmetic is done in
software on an M4 (its FPU is single precision only); that is expected.

What a caller does, for generated sources ``P.c``/``P.h`` (the API in docs/c-target.md)::

    main = selftest_main_c("P", rows, n_outputs, n_predictions)   # a main.c of test vectors
    elf = build_elf(workdir, [P_c, main_c_path])                  # BoardError on any failure
    results = parse_selftest_output(run_qemu(elf))                # [(rc, raw, out)] per row
    footprint(elf)                                                # text/data/bss/flash/ram

or :func:`run_selftest` for all of it at once; :func:`write_bundle` and :func:`makefile` lay
out a folder that builds the same thing with ``make`` (``all``, ``host``, ``qemu``, ``clean``).

Tools: ``arm-none-eabi-gcc`` and ``arm-none-eabi-size`` (Debian: gcc-arm-none-eabi,
libnewlib-arm-none-eabi) and ``qemu-system-arm`` (Debian: qemu-system-arm). :func:`toolchain`
finds them; :func:`unavailable_reason` says what is missing. Standard library only.
"""
from __future__ import annotations

import math
import os
import re
import shutil
import struct
import subprocess
import time
from pathlib import Path
from typing import Dict, Iterable, List, NamedTuple, Optional, Sequence, Tuple, Union

PathLike = Union[str, Path]

MACHINE = "mps2-an386"
ARCH_FLAGS = ("-mcpu=cortex-m4", "-mthumb", "-mfloat-abi=hard", "-mfpu=fpv4-sp-d16")
# Every source on the board; sections per function so the link drops what is unused.
CFLAGS = ARCH_FLAGS + ("-std=c99", "-O2", "-ffunction-sections", "-fdata-sections")
# The model's sources and the self-test main: portable C99, warnings are errors.
WARN_FLAGS = ("-Wall", "-Wextra", "-pedantic", "-Werror")
# The startup file uses GCC extensions (asm, section attributes) on purpose: no -pedantic.
STARTUP_WARN_FLAGS = ("-Wall", "-Wextra", "-Werror")
# Our own startup replaces the C runtime's; newlib-nano's libc, semihosting system calls.
LDFLAGS = ("-nostartfiles", "--specs=nano.specs", "--specs=rdimon.specs", "-Wl,--gc-sections")
LIBS = ("-lm",)
QEMU_ARGS = ("-M", MACHINE, "-display", "none", "-serial", "none", "-monitor", "none",
             "-no-reboot", "-semihosting-config", "enable=on,target=native")
HOST_CFLAGS = ("-std=c99", "-O2")

_IDENT = re.compile(r"[A-Za-z_][A-Za-z0-9_]*\Z")


class BoardError(RuntimeError):
    """Building or running on the board failed; the message carries the tool's own output."""


# --------------------------------------------------------------------------------------------
# The startup file and the linker script

STARTUP_C = r"""/* Startup for a Cortex-M4 (QEMU mps2-an386), written for boxwood's board harness.
 *
 * The vector table's first two words are the initial stack pointer and the reset handler.
 * The reset handler enables the FPU, copies .data from its load address, zeroes .bss,
 * opens the semihosting standard streams (newlib's librdimon), calls main and exits with
 * its status through semihosting SYS_EXIT, which ends QEMU. Faults print a line on the
 * semihosting console and stop QEMU with a run-time-error exit (QEMU's status is then 1).
 */
#include <stdint.h>
#include <stdlib.h>

extern uint32_t __data_load__, __data_start__, __data_end__, __bss_start__, __bss_end__;
extern uint32_t __stack_top__;
extern int main(void);
extern void initialise_monitor_handles(void);

void Reset_Handler(void);
void Fault_Handler(void);
void _init(void);
void _fini(void);

#define SEMIHOST_SYS_WRITE0 0x04u
#define SEMIHOST_SYS_EXIT 0x18u
#define ADP_STOPPED_RUN_TIME_ERROR 0x20023u
#define CPACR (*(volatile uint32_t *)0xE000ED88u)

static uint32_t semihost(uint32_t op, const void *arg)
{
    register uint32_t r0 __asm__("r0") = op;
    register const void *r1 __asm__("r1") = arg;
    __asm__ volatile ("bkpt 0xab" : "+r"(r0) : "r"(r1) : "memory");
    return r0;
}

void Fault_Handler(void)
{
    char msg[] = "board: fault, exception 0x00\n";
    static const char hex[] = "0123456789abcdef";
    uint32_t ipsr;
    __asm__ volatile ("mrs %0, ipsr" : "=r"(ipsr));
    msg[sizeof msg - 4] = hex[(ipsr >> 4) & 0xFu];
    msg[sizeof msg - 3] = hex[ipsr & 0xFu];
    semihost(SEMIHOST_SYS_WRITE0, msg);
    for (;;) {
        /* On AArch32 the SYS_EXIT argument is the reason code itself. */
        semihost(SEMIHOST_SYS_EXIT, (const void *)ADP_STOPPED_RUN_TIME_ERROR);
    }
}

/* 16 system entries: SP, Reset, NMI, HardFault, MemManage, BusFault, UsageFault, 4 reserved,
   SVCall, DebugMonitor, reserved, PendSV, SysTick. No interrupt is enabled. */
__attribute__((section(".vectors"), used))
static void (*const vectors[16])(void) = {
    (void (*)(void))&__stack_top__,
    Reset_Handler,
    Fault_Handler, Fault_Handler, Fault_Handler, Fault_Handler, Fault_Handler,
    0, 0, 0, 0,
    Fault_Handler, Fault_Handler, 0, Fault_Handler, Fault_Handler,
};

void Reset_Handler(void)
{
    uint32_t *src, *dst;
    /* CP10 and CP11 full access (CPACR bits 20-23), before any floating-point instruction. */
    CPACR |= 0xFu << 20;
    __asm__ volatile ("dsb\n\tisb" ::: "memory");
    for (src = &__data_load__, dst = &__data_start__; dst < &__data_end__;)
        *dst++ = *src++;
    for (dst = &__bss_start__; dst < &__bss_end__;)
        *dst++ = 0;
    initialise_monitor_handles();
    exit(main());
}

/* The C runtime's crti/crtn are not linked (-nostartfiles); C needs no constructors. */
void _init(void) {}
void _fini(void) {}
"""

LINKER_SCRIPT = """/* Linker script for QEMU's mps2-an386 (Cortex-M4), written for boxwood's board harness.
 *
 * Memory map as QEMU 7.2 itself reports it for this machine (monitor command
 * `info mtree` on `qemu-system-arm -M mps2-an386`):
 *   0x00000000-0x003fffff  mps.ssram1   (4 MiB; mirrored at 0x00400000)  -> code, read-only data
 *   0x20000000-0x203fffff  mps.ssram23  (4 MiB; mirrored at 0x20400000)  -> data, bss, heap, stack
 * (also block RAM at 0x01000000 and 16 MiB at 0x21000000, unused here). On the real board
 * SSRAM1 is RAM that the debugger loads; it stands in for flash, so it is called FLASH below
 * and everything placed there counts as flash in the footprint. QEMU resets the core with
 * the stack pointer and reset vector read from address 0 (VTOR = 0).
 */
MEMORY
{
    FLASH (rx)  : ORIGIN = 0x00000000, LENGTH = 4M
    RAM   (rwx) : ORIGIN = 0x20000000, LENGTH = 4M
}

ENTRY(Reset_Handler)
__stack_top__ = ORIGIN(RAM) + LENGTH(RAM);

SECTIONS
{
    .text :
    {
        KEEP(*(.vectors))
        *(.text .text.*)
        *(.rodata .rodata.*)
        . = ALIGN(4);
    } > FLASH

    .ARM.extab : { *(.ARM.extab* .gnu.linkonce.armextab.*) } > FLASH
    .ARM.exidx :
    {
        __exidx_start = .;
        *(.ARM.exidx* .gnu.linkonce.armexidx.*)
        __exidx_end = .;
    } > FLASH

    . = ALIGN(4);
    __data_load__ = .;
    .data : AT(__data_load__)
    {
        __data_start__ = .;
        *(.data .data.*)
        . = ALIGN(4);
        __data_end__ = .;
    } > RAM

    .bss (NOLOAD) :
    {
        __bss_start__ = .;
        *(.bss .bss.*)
        *(COMMON)
        . = ALIGN(4);
        __bss_end__ = .;
    } > RAM

    /* The heap (newlib's sbrk) starts here and grows up to the stack. */
    . = ALIGN(8);
    end = .;
    _end = .;
    __end__ = .;
}
"""


# --------------------------------------------------------------------------------------------
# Tools

class Toolchain(NamedTuple):
    gcc: str
    size: str
    qemu: str


_TOOLS = (("gcc", "arm-none-eabi-gcc"), ("size", "arm-none-eabi-size"), ("qemu", "qemu-system-arm"))
_PACKAGES = "gcc-arm-none-eabi libnewlib-arm-none-eabi qemu-system-arm"


def toolchain() -> Optional[Toolchain]:
    """The paths of arm-none-eabi-gcc, arm-none-eabi-size and qemu-system-arm, or None
    when any of them is not on PATH."""
    found = {field: shutil.which(program) for field, program in _TOOLS}
    if any(v is None for v in found.values()):
        return None
    return Toolchain(**found)  # type: ignore[arg-type]


def _has_newlib(gcc: str) -> bool:
    """Whether gcc finds newlib's semihosting library for the board's multilib."""
    try:
        out = subprocess.run([gcc] + list(ARCH_FLAGS) + ["-print-file-name=librdimon_nano.a"],
                             stdin=subprocess.DEVNULL, capture_output=True, text=True, timeout=60).stdout
    except (OSError, subprocess.SubprocessError):
        return False
    return os.path.isfile(out.strip())


def unavailable_reason() -> Optional[str]:
    """None when the board can be used here, else what is missing (one line)."""
    missing = [program for _, program in _TOOLS if shutil.which(program) is None]
    if missing:
        return "not on PATH: %s (Debian packages: %s)" % (", ".join(missing), _PACKAGES)
    if not _has_newlib(str(shutil.which("arm-none-eabi-gcc"))):
        return ("arm-none-eabi-gcc finds no newlib for the Cortex-M4 (librdimon_nano.a); "
                "Debian package: libnewlib-arm-none-eabi")
    return None


def _tools() -> Toolchain:
    tc = toolchain()
    if tc is None:
        raise BoardError("the Cortex-M4 board cannot be used: " + str(unavailable_reason()))
    return tc


def _run(cmd: Sequence[str], what: str, cwd: Optional[PathLike] = None) -> str:
    proc = subprocess.run(list(cmd), cwd=cwd, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                          stderr=subprocess.PIPE, text=True)
    if proc.returncode != 0:
        raise BoardError("%s failed (exit %d): %s\n%s%s" % (
            what, proc.returncode, " ".join(cmd), proc.stderr, proc.stdout))
    return proc.stdout


# --------------------------------------------------------------------------------------------
# Building, measuring, running

def write_board_files(folder: PathLike) -> Tuple[Path, Path]:
    """Write startup.c and link.ld into ``folder``; returns their paths."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    startup, script = folder / "startup.c", folder / "link.ld"
    startup.write_text(STARTUP_C, encoding="utf-8")
    script.write_text(LINKER_SCRIPT, encoding="utf-8")
    return startup, script


def build_elf(workdir: PathLike, c_files: Iterable[PathLike], include_dirs: Iterable[PathLike] = (),
              cflags_extra: Iterable[str] = (), name: str = "board") -> Path:
    """Compile ``c_files`` (with :data:`WARN_FLAGS`) and the board's startup file for the
    Cortex-M4 and link them with the board's linker script into ``workdir/<name>.elf``.

    startup.c, link.ld and one object per source are left in ``workdir`` (``footprint`` of an
    object gives that source's own size). Raises BoardError with the compiler's or the
    linker's messages on any failure, or when the tools are missing."""
    tc = _tools()
    workdir = Path(workdir).resolve()
    startup, script = write_board_files(workdir)
    sources = [Path(c).resolve() for c in c_files]
    if not sources:
        raise BoardError("build_elf: no C files given")
    for src in sources:
        if not src.is_file():
            raise BoardError("build_elf: no such C file: %s" % src)
    common = list(CFLAGS) + ["-I%s" % Path(d).resolve() for d in include_dirs] + list(cflags_extra)
    objects: List[Path] = []
    used = set()
    jobs = [(startup, list(STARTUP_WARN_FLAGS))] + [(s, list(WARN_FLAGS)) for s in sources if s != startup]
    for src, warn in jobs:
        stem, n = src.stem, 1
        while stem in used:
            n += 1
            stem = "%s_%d" % (src.stem, n)
        used.add(stem)
        obj = workdir / (stem + ".o")
        _run([tc.gcc] + common + warn + ["-c", str(src), "-o", str(obj)], "compiling %s" % src.name)
        objects.append(obj)
    elf = workdir / (name + ".elf")
    _run([tc.gcc] + list(CFLAGS) + list(cflags_extra) + ["-T", str(script)] + list(LDFLAGS)
         + [str(o) for o in objects] + list(LIBS) + ["-o", str(elf)], "linking %s" % elf.name)
    return elf


def footprint(elf: PathLike) -> Dict[str, int]:
    """Sizes in bytes from ``arm-none-eabi-size`` (Berkeley format) of an ELF or an object:
    text, data, bss, flash (text + data: data's initial values live in flash) and ram
    (data + bss; the heap and the stack come on top)."""
    out = _run([_tools().size, "-B", str(elf)], "arm-none-eabi-size")
    lines = [ln.split() for ln in out.strip().splitlines()]
    if len(lines) < 2 or lines[0][:3] != ["text", "data", "bss"]:
        raise BoardError("unexpected arm-none-eabi-size output:\n" + out)
    try:
        text, data, bss = (int(v) for v in lines[1][:3])
    except ValueError:
        raise BoardError("unexpected arm-none-eabi-size output:\n" + out) from None
    return {"text": text, "data": data, "bss": bss, "flash": text + data, "ram": data + bss}


def qemu_command(elf: PathLike, qemu: str = "qemu-system-arm") -> List[str]:
    """The command line that runs ``elf`` on the board (semihosting output on stdout)."""
    return [qemu] + list(QEMU_ARGS) + ["-kernel", str(elf)]


def run_qemu(elf: PathLike, timeout: float = 120, check: bool = True) -> str:
    """Run ``elf`` under QEMU until the program exits (semihosting SYS_EXIT ends QEMU) and
    return what it printed. QEMU is killed after ``timeout`` seconds and BoardError raised;
    with ``check``, a nonzero exit (main's status, or 1 after a fault) raises BoardError too."""
    cmd = qemu_command(elf, _tools().qemu)
    try:
        proc = subprocess.run(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True, timeout=timeout)
    except subprocess.TimeoutExpired as e:  # subprocess.run has killed and reaped QEMU
        printed = e.stdout.decode("utf-8", "replace") if isinstance(e.stdout, bytes) else (e.stdout or "")
        raise BoardError("QEMU did not finish within %gs and was killed: %s\nlast output:\n%s"
                         % (timeout, " ".join(cmd), printed[-2000:])) from None
    if check and proc.returncode != 0:
        raise BoardError("the program on the board exited with status %d: %s\n%s%s" % (
            proc.returncode, " ".join(cmd), proc.stderr, proc.stdout[-2000:]))
    return proc.stdout


# --------------------------------------------------------------------------------------------
# The self-test program and its output

def c_double(value: float) -> str:
    """A C99 expression of type double with exactly this value: a hexadecimal floating
    literal, NAN or INFINITY from <math.h> (a NaN's sign and payload are not kept)."""
    v = float(value)
    if math.isnan(v):
        return "NAN"
    if math.isinf(v):
        return "INFINITY" if v > 0 else "-INFINITY"
    return v.hex()


def _check_prefix(prefix: str) -> None:
    if not _IDENT.match(prefix):
        raise ValueError("not a C identifier prefix: %r" % (prefix,))


def selftest_main_c(prefix: str, rows: Sequence[Sequence[float]], n_outputs: int, n_predictions: int,
                    expected_raw: Optional[Sequence[Sequence[float]]] = None,
                    expected_out: Optional[Sequence[Sequence[float]]] = None, out_ulps: int = 8) -> str:
    """A main.c that runs ``prefix``_raw and ``prefix``_predict on each row and prints, per row,
    ``row <i> rc <code> raw <bits>... out <bits>...`` (each value's IEEE 754 bits as 16 hex
    digits) and finally ``done <n>``. ``code`` is P_raw's code, or P_predict's when P_raw
    returned 0. Both buffers are zeroed before each call. The program is plain C99 (stdio,
    no board code), so it runs natively too. Compile-time checks make it fail to build when
    P.h's sizes disagree with what is given here: P_N_FEATURES, P_N_OUTPUTS and
    P_N_PREDICTIONS, with P upper-cased (as the generator writes them) or as given.

    With ``expected_raw`` (one list of n_outputs values per row) the program also checks
    itself on the device: every row must return 0 and give the expected raw values bit for
    bit, and, with ``expected_out``, predictions within ``out_ulps`` units in the last place.
    A row that differs is followed by ``mismatch row <i>: ...``; after ``done`` comes
    ``PASS: ...`` (status 0) or ``FAIL: ...`` (status 1, which make and QEMU pass on)."""
    _check_prefix(prefix)
    rows = [list(r) for r in rows]
    if n_outputs < 1 or n_predictions < 1:
        raise ValueError("n_outputs and n_predictions must be at least 1")
    for name, table, width in (("expected_raw", expected_raw, n_outputs),
                               ("expected_out", expected_out, n_predictions)):
        if table is not None and (len(table) != len(rows) or any(len(t) != width for t in table)):
            raise ValueError("%s must hold %d values for each of the %d rows" % (name, width, len(rows)))
    if expected_out is not None and expected_raw is None:
        raise ValueError("expected_out needs expected_raw")
    widths = {len(r) for r in rows}
    if len(widths) > 1:
        raise ValueError("rows differ in length: %s" % sorted(widths))
    n_features = widths.pop() if widths else None
    if n_features == 0:
        raise ValueError("rows have no values")
    P = prefix
    lines = [
        "/* Self-test of %s.c, written by boxwood's board harness. */" % P,
        "#include <math.h>",
        "#include <stdint.h>",
        "#include <stdio.h>",
        "#include <string.h>",
        '#include "%s.h"' % P,
        "",
        "#define BOXWOOD_N_OUTPUTS %d" % n_outputs,
        "#define BOXWOOD_N_PREDICTIONS %d" % n_predictions,
        "#define BOXWOOD_N_FEATURES %d" % (n_features or 1),
        "",
        "/* Fails to compile (negative array size) when %s.h disagrees with the test vectors." % P,
        "   The sizes may be spelt with the prefix upper-cased or as given. */",
    ]
    checks = [("OUTPUTS", n_outputs), ("PREDICTIONS", n_predictions)]
    if n_features is not None:
        checks.append(("FEATURES", n_features))
    for what, n in checks:
        up, asis = "%s_N_%s" % (P.upper(), what), "%s_N_%s" % (P, what)
        lines += ["#if defined(%s)" % up,
                  "typedef char boxwood_check_n_%s[(%s == %d) ? 1 : -1];" % (what.lower(), up, n),
                  "#elif defined(%s)" % asis,
                  "typedef char boxwood_check_n_%s[(%s == %d) ? 1 : -1];" % (what.lower(), asis, n),
                  "#else",
                  '#error "%s.h defines neither %s nor %s"' % (P, up, asis),
                  "#endif"]
    lines += ["", "static const unsigned long n_rows = %d;" % len(rows), "",
              "static const double rows[%d][BOXWOOD_N_FEATURES] = {" % max(len(rows), 1)]
    for r in rows:
        lines.append("    {" + ", ".join(c_double(v) for v in r) + "},")
    if not rows:
        lines.append("    {0.0},  /* placeholder: there are no rows */")
    lines += [
        "};",
        "",
        "static void print_bits(const double *v, int n)",
        "{",
        "    int k;",
        "    for (k = 0; k < n; k++) {",
        "        uint64_t u;",
        "        memcpy(&u, &v[k], sizeof u);",
        '        printf(" %08lx%08lx", (unsigned long)(u >> 32), (unsigned long)(u & 0xffffffffUL));',
        "    }",
        "}",
        "",
    ]
    checking = expected_raw is not None
    if checking:
        lines += _expectations_c(expected_raw, expected_out, len(rows), out_ulps)
    lines += ["int main(void)", "{", "    unsigned long i;"] + (
        ["    unsigned long failed = 0;"] if checking else []) + [
        "    for (i = 0; i < n_rows; i++) {",
        "        double raw[BOXWOOD_N_OUTPUTS], out[BOXWOOD_N_PREDICTIONS];",
        "        int rc, prc;",
        "        memset(raw, 0, sizeof raw);",
        "        memset(out, 0, sizeof out);",
        "        rc = %s_raw(rows[i], raw);" % P,
        "        prc = %s_predict(rows[i], out);" % P,
        '        printf("row %lu rc %d raw", i, rc != 0 ? rc : prc);',
        "        print_bits(raw, BOXWOOD_N_OUTPUTS);",
        '        printf(" out");',
        "        print_bits(out, BOXWOOD_N_PREDICTIONS);",
        '        printf("\\n");',
    ] + (["        failed += check_row(i, rc != 0 ? rc : prc, raw, out);"] if checking else []) + [
        "    }",
        '    printf("done %lu\\n", i);',
    ] + ([
        "    if (failed != 0) {",
        '        printf("FAIL: %lu of %lu reference rows differ\\n", failed, n_rows);',
        "        return 1;",
        "    }",
        '    printf("PASS: %%lu reference rows, raw values bit for bit%s\\n", n_rows);'
        % (", predictions within %d ulps" % out_ulps if expected_out is not None else ""),
    ] if checking else []) + ["    return 0;", "}", ""]
    return "\n".join(lines)


def _expectations_c(expected_raw: Sequence[Sequence[float]], expected_out: Optional[Sequence[Sequence[float]]],
                    n_rows: int, out_ulps: int) -> List[str]:
    """The expected values (IEEE 754 bits) and check_row() of a checking self-test main.c."""
    def table(name: str, width: str, values: Sequence[Sequence[float]]) -> List[str]:
        out = ["static const uint64_t %s[%d][%s] = {" % (name, max(n_rows, 1), width)]
        out += ["    {%s}," % ", ".join("UINT64_C(0x%016x)" % struct.unpack("<Q", struct.pack("<d", float(v)))[0]
                                      for v in r) for r in values]
        return out + (["    {0},  /* placeholder: there are no rows */"] if not values else []) + ["};", ""]

    lines = ["/* What the source model computed for these rows (IEEE 754 bits). */"]
    lines += table("expected_raw", "BOXWOOD_N_OUTPUTS", expected_raw)
    if expected_out is not None:
        lines += table("expected_out", "BOXWOOD_N_PREDICTIONS", expected_out) + [
            "/* A double's bits as an integer in value order (-0 and +0 alike): ulps are differences. */",
            "static uint64_t ordered(uint64_t u)",
            "{",
            "    return (u >> 63) ? UINT64_C(0x8000000000000000) - (u & UINT64_C(0x7fffffffffffffff))",
            "                     : u + UINT64_C(0x8000000000000000);",
            "}",
            ""]
    lines += [
        "/* 1 (and a mismatch line) when row i differs from the reference, else 0. */",
        "static int check_row(unsigned long i, int rc, const double *raw, const double *out)",
        "{",
        "    int k;",
        "    uint64_t u;",
        "    if (rc != 0) {",
        '        printf("mismatch row %lu: error code %d\\n", i, rc);',
        "        return 1;",
        "    }",
        "    for (k = 0; k < BOXWOOD_N_OUTPUTS; k++) {",
        "        memcpy(&u, &raw[k], sizeof u);",
        "        if (u != expected_raw[i][k]) {",
        '            printf("mismatch row %lu: raw %d differs\\n", i, k);',
        "            return 1;",
        "        }",
        "    }",
    ]
    if expected_out is not None:
        lines += [
            "    for (k = 0; k < BOXWOOD_N_PREDICTIONS; k++) {",
            "        uint64_t a, b = ordered(expected_out[i][k]);",
            "        memcpy(&u, &out[k], sizeof u);",
            "        a = ordered(u);",
            "        /* a NaN (its exponent all ones, fraction not zero) matches only the same bits */",
            "        if ((a > b ? a - b : b - a) > %d || (u != expected_out[i][k] && ((u << 1) > "
            "UINT64_C(0xffe0000000000000) || (expected_out[i][k] << 1) > UINT64_C(0xffe0000000000000)))) {" % out_ulps,
            '            printf("mismatch row %%lu: prediction %%d is more than %d ulps off\\n", i, k);' % out_ulps,
            "            return 1;",
            "        }",
            "    }",
        ]
    else:
        lines.append("    (void)out;")
    return lines + ["    return 0;", "}", ""]


_ROW = re.compile(r"row (\d+) rc (-?\d+) raw((?: [0-9a-f]{16})*) out((?: [0-9a-f]{16})*)\Z")
_DONE = re.compile(r"done (\d+)\Z")


def _from_bits(hexes: str) -> List[float]:
    return [struct.unpack(">d", bytes.fromhex(h))[0] for h in hexes.split()]


def parse_selftest_output(text: str) -> List[Tuple[int, List[float], List[float]]]:
    """The rows printed by a :func:`selftest_main_c` program: ``[(rc, raw, out), ...]`` with
    the values rebuilt bit for bit. Lines that are not the program's are ignored. Raises
    BoardError when the output stops early (no ``done`` line, or fewer rows than it says),
    when rows are out of order, or when a row line is damaged."""
    results: List[Tuple[int, List[float], List[float]]] = []
    done: Optional[int] = None
    for number, line in enumerate(text.splitlines(), 1):
        line = line.strip()
        if line.startswith("row "):
            if done is not None:
                raise BoardError("self-test output has a row after its done line (line %d)" % number)
            m = _ROW.match(line)
            if not m:
                raise BoardError("self-test output line %d is damaged or cut short: %r" % (number, line[:200]))
            if int(m.group(1)) != len(results):
                raise BoardError("self-test output line %d is row %s, expected row %d"
                                 % (number, m.group(1), len(results)))
            results.append((int(m.group(2)), _from_bits(m.group(3)), _from_bits(m.group(4))))
        elif line.startswith("done"):
            m = _DONE.match(line)
            if not m:
                raise BoardError("self-test output line %d is damaged: %r" % (number, line[:200]))
            done = int(m.group(1))
    if done is None:
        raise BoardError("self-test output is truncated: %d row(s) and no done line; last lines:\n%s"
                         % (len(results), "\n".join(text.splitlines()[-3:])))
    if done != len(results):
        raise BoardError("self-test output is truncated: done %d but %d row(s)" % (done, len(results)))
    return results


class Selftest(NamedTuple):
    results: List[Tuple[int, List[float], List[float]]]
    elf: Path
    footprint: Dict[str, int]
    seconds: float  # the QEMU run alone


def run_selftest(workdir: PathLike, prefix: str, c_files: Iterable[PathLike], rows: Sequence[Sequence[float]],
                 n_outputs: int, n_predictions: int, include_dirs: Iterable[PathLike] = (),
                 timeout: float = 120) -> Selftest:
    """Write a self-test main.c for ``rows`` into ``workdir``, build it with ``c_files`` (the
    model's sources; the folder of each is searched for ``prefix``.h), run it under QEMU and
    parse what it printed."""
    workdir = Path(workdir)
    workdir.mkdir(parents=True, exist_ok=True)
    sources = [Path(c) for c in c_files]
    main = workdir / "main.c"
    main.write_text(selftest_main_c(prefix, rows, n_outputs, n_predictions), encoding="utf-8")
    dirs = list(include_dirs) + list(dict.fromkeys(s.resolve().parent for s in sources))
    elf = build_elf(workdir, sources + [main], include_dirs=dirs, name=prefix + "_selftest")
    start = time.monotonic()
    text = run_qemu(elf, timeout=timeout)
    seconds = time.monotonic() - start
    results = parse_selftest_output(text)
    if len(results) != len(rows):
        raise BoardError("the self-test printed %d rows for %d test vectors" % (len(results), len(rows)))
    return Selftest(results, elf, footprint(elf), seconds)


# --------------------------------------------------------------------------------------------
# A bundle folder that builds with make

def makefile(prefix: str) -> str:
    """A Makefile for a folder holding P.c, P.h, main.c, startup.c and link.ld:
    ``make`` (all) builds P.elf for the Cortex-M4 and prints its size, ``make host`` builds
    main.c natively and runs it, ``make qemu`` runs P.elf under QEMU, ``make clean``."""
    _check_prefix(prefix)
    P = prefix
    return "\n".join([
        "# Builds %s.c with main.c for a Cortex-M4 (QEMU %s) or for this computer." % (P, MACHINE),
        "# Written by boxwood's board harness. Needs arm-none-eabi-gcc with newlib",
        "# (Debian: gcc-arm-none-eabi libnewlib-arm-none-eabi) and qemu-system-arm.",
        "",
        "PREFIX = %s" % P,
        "CROSS ?= arm-none-eabi-",
        "ARM_CC = $(CROSS)gcc",
        "ARM_SIZE = $(CROSS)size",
        "QEMU ?= qemu-system-arm",
        "HOST_CC ?= cc",
        "CFLAGS = %s" % " ".join(CFLAGS),
        "WARN = %s" % " ".join(WARN_FLAGS),
        "STARTUP_WARN = %s" % " ".join(STARTUP_WARN_FLAGS),
        "LDFLAGS = -T link.ld %s" % " ".join(LDFLAGS),
        "LDLIBS = %s" % " ".join(LIBS),
        "HOST_CFLAGS = %s" % " ".join(HOST_CFLAGS),
        "QEMU_FLAGS = %s" % " ".join(QEMU_ARGS),
        "",
        "ELF = $(PREFIX).elf",
        "HOST = $(PREFIX)-host",
        "# Linked in build_elf's order (startup first), so the sizes are the ones it measures.",
        "OBJS = startup.arm.o $(PREFIX).arm.o main.arm.o",
        "",
        ".PHONY: all host qemu clean",
        "",
        "all: $(ELF)",
        "\t$(ARM_SIZE) $(ELF)",
        "",
        "$(PREFIX).arm.o: $(PREFIX).c $(PREFIX).h",
        "\t$(ARM_CC) $(CFLAGS) $(WARN) -c $(PREFIX).c -o $@",
        "",
        "main.arm.o: main.c $(PREFIX).h",
        "\t$(ARM_CC) $(CFLAGS) $(WARN) -c main.c -o $@",
        "",
        "startup.arm.o: startup.c",
        "\t$(ARM_CC) $(CFLAGS) $(STARTUP_WARN) -c startup.c -o $@",
        "",
        "$(ELF): $(OBJS) link.ld",
        "\t$(ARM_CC) $(CFLAGS) $(LDFLAGS) $(OBJS) $(LDLIBS) -o $@",
        "",
        "$(HOST): $(PREFIX).c $(PREFIX).h main.c",
        "\t$(HOST_CC) $(HOST_CFLAGS) $(WARN) main.c $(PREFIX).c -lm -o $@",
        "",
        "host: $(HOST)",
        "\t./$(HOST)",
        "",
        "qemu: $(ELF)",
        "\t$(QEMU) $(QEMU_FLAGS) -kernel $(ELF)",
        "",
        "clean:",
        "\trm -f $(OBJS) $(ELF) $(HOST)",
        "",
    ])


def write_bundle(folder: PathLike, prefix: str, rows: Sequence[Sequence[float]], n_outputs: int,
                 n_predictions: int, expected_raw: Optional[Sequence[Sequence[float]]] = None,
                 expected_out: Optional[Sequence[Sequence[float]]] = None, out_ulps: int = 8) -> List[Path]:
    """Write main.c (the self-test of ``rows``; with ``expected_raw`` it checks itself and prints
    PASS or FAIL, see :func:`selftest_main_c`), startup.c, link.ld and the Makefile into
    ``folder``, next to the generator's P.c and P.h; returns the paths written."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    main = folder / "main.c"
    main.write_text(selftest_main_c(prefix, rows, n_outputs, n_predictions, expected_raw, expected_out, out_ulps),
                    encoding="utf-8")
    make = folder / "Makefile"
    make.write_text(makefile(prefix), encoding="utf-8")
    return [main, *write_board_files(folder), make]
