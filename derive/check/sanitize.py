"""`luforge verify --sanitize`: compile a kernel's shipped .c with AddressSanitizer and UndefinedBehaviorSanitizer
into a small standalone driver that calls it on buffers of exactly the documented size, and report what they catch."""
from __future__ import annotations

import subprocess
import tempfile
from pathlib import Path

from derive.check.build import BuildError, compiler_words, run_compiler
from derive.options import KernelOptions
from derive.targets.storage import LAYOUTS, SCALARS

SANITIZE_FLAGS = ("-std=c99", "-g", "-O1", "-fno-omit-frame-pointer", "-fsanitize=address,undefined",
                  "-fno-sanitize-recover=all")
# --sanitize runs at most this size: a sanitized kernel runs several times slower, and canaries already guard
# every size in the ordinary run
SANITIZE_UP_TO = 300


def driver_prologue(name: str) -> str:
    """What every sanitizer driver (single-matrix and batched) starts with: its includes and a deterministic
    generator of test entries."""
    return f"""#include <stdio.h>
#include <stdlib.h>
#include "{name}.h"

static unsigned long long state = 88172645463325252ULL;
static double uniform(void)   /* xorshift64: any deterministic stream will do */
{{
    state ^= state << 13; state ^= state >> 7; state ^= state << 17;
    return (double)(state >> 11) / 9007199254740992.0 * 2.0 - 1.0;
}}
"""


def general_driver(o: KernelOptions, sizes: list[int]) -> str:
    """A C driver for the general ABI: each n gets malloc'd buffers of exactly lda*n (and n, ldb*nrhs) elements,
    so any access outside them lands in an ASan red zone; a column-dominant matrix keeps every code 0."""
    t = SCALARS[o.scalar].c_type
    layout = LAYOUTS[o.layout]
    at = layout.index.replace("(ld)", "(lda)")
    b_lead = "n" if layout.leading == "rows" else "nrhs"
    b_other = "nrhs" if layout.leading == "rows" else "n"
    pivoted = o.pivoting != "none"
    piv_arg = ", ipiv" if pivoted else ""
    fixed = getattr(o, "size", None) is not None     # the fixed-size ABI has no n argument
    n_arg = "" if fixed else "n, "
    shown = [o.size] if fixed else [n for n in sizes if n <= SANITIZE_UP_TO]
    return f"""{driver_prologue(o.name)}
int main(void)
{{
    static const int sizes[] = {{{", ".join(str(n) for n in shown) or "0"}}};
    int s, failures = 0;
    for (s = 0; s < (int)(sizeof sizes / sizeof sizes[0]); ++s) {{
        int n = sizes[s], nrhs = 2, i, j, info, code;
        int lda = n > 0 ? n : 1, ldb = {b_lead} > 0 ? {b_lead} : 1;
        {t} *a = malloc(sizeof({t}) * (size_t)lda * (size_t)(n > 0 ? n : 1));
        {t} *b = malloc(sizeof({t}) * (size_t)ldb * (size_t)({b_other} > 0 ? {b_other} : 1));
        int *ipiv = malloc(sizeof(int) * (size_t)(n > 0 ? n : 1));
        if (!a || !b || !ipiv) {{ puts("out of memory"); return 2; }}
        for (j = 0; j < n; ++j) {{
            double sum = 1.0;
            for (i = 0; i < n; ++i) {{
                double v = i == j ? 0.0 : uniform();
                a[{at}] = ({t})v;
                sum += v < 0 ? -v : v;
            }}
            a[{at.replace("(i)", "(j)")}] = ({t})sum;
        }}
        for (i = 0; i < ldb * ({b_other} > 0 ? {b_other} : 1); ++i) b[i] = ({t})uniform();
        info = {o.name}({n_arg}a, lda{piv_arg});
        code = {o.name}_solve({n_arg}nrhs, a, lda{piv_arg}, b, ldb);
        if (info != 0 || code != 0) {{ printf("n=%d: codes %d and %d on a dominant matrix\\n", n, info, code);
                                      ++failures; }}
        free(a); free(b); free(ipiv);
    }}
    return failures ? 1 : 0;
}}
"""


def sanitize_kernel(o: KernelOptions, c_path: Path, driver: str, cflags: tuple[str, ...] = ()) -> list[str]:
    """Build `driver` with the shipped NAME.c under ASan + UBSan and run it; one line per problem found."""
    cc, *cc_flags = compiler_words()
    with tempfile.TemporaryDirectory(prefix="luforge-sanitize-") as tmp:
        drv = Path(tmp) / "driver.c"
        drv.write_text(driver)
        exe = Path(tmp) / "driver"
        try:
            run_compiler([cc, *cc_flags, *SANITIZE_FLAGS, *cflags, f"-I{c_path.parent}", str(drv), str(c_path),
                          "-o", str(exe)], f"building {o.name} with -fsanitize=address,undefined")
        except BuildError as e:
            return [f"--sanitize: {e}"]
        try:
            res = subprocess.run([str(exe)], capture_output=True, text=True, timeout=600,
                                 env={"ASAN_OPTIONS": "detect_leaks=0:abort_on_error=0",
                                      "UBSAN_OPTIONS": "print_stacktrace=1"})
        except subprocess.TimeoutExpired:
            return ["--sanitize: the sanitized driver ran for more than 600 s"]
    if res.returncode == 0:
        return []
    text = (res.stderr + res.stdout).splitlines()
    first = next((ln for ln in text if "ERROR: AddressSanitizer" in ln or "runtime error" in ln), None)
    first = first or next((ln for ln in text if ln.strip()), f"exit status {res.returncode}")
    return [f"--sanitize: {first.strip()[:300]}"]
