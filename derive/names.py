"""The namespace rule for everything a kernel emits, checked over the emitted text of every kernel of a spec
before anything is written: no keyword, reserved or C library name, no shadowed Python module, no clash."""
from __future__ import annotations

import keyword
import re
import sys
from dataclasses import dataclass

# The rule: kernel NAME owns the C identifiers NAME and NAME_*, the macros NAME_* in upper case (include guard,
# version, block, linkage, indexing) and the Python module NAME. Every file-scope symbol found in its emitted text
# must lie in that space, none may be a word below, and no two kernels may share one (a macro of one kernel may
# not even appear as a token in another's code: the preprocessor would rewrite it in a unity build).

C_KEYWORDS = frozenset("""auto break case char const continue default do double else enum extern float for goto if
inline int long register restrict return short signed sizeof static struct switch typedef union unsigned void
volatile while _Alignas _Alignof _Atomic _Bool _Complex _Generic _Imaginary _Noreturn _Static_assert
_Thread_local""".split())
# ISO C++ 2020 [lex.key] and the alternative tokens [lex.digraph]: the header is included from C++ too
CXX_KEYWORDS = frozenset("""alignas alignof and and_eq asm bitand bitor bool catch char8_t char16_t char32_t class
compl concept consteval constexpr constinit const_cast co_await co_return co_yield decltype delete dynamic_cast
explicit export false friend mutable namespace new noexcept not not_eq nullptr operator or or_eq private protected
public reinterpret_cast requires static_assert static_cast template this thread_local throw true try typeid
typename using virtual wchar_t xor xor_eq final override import module""".split())
# Names of the C standard library (C11 clause 7, from memory): functions, macros and types a kernel could
# collide with when linked or compiled beside the user's code; <stddef.h> in full, since the header includes it.
C_LIBRARY = frozenset("""main NULL offsetof size_t ptrdiff_t wchar_t max_align_t
abort abs aligned_alloc atexit at_quick_exit atof atoi atol atoll bsearch calloc div exit _Exit free getenv labs
ldiv llabs lldiv malloc mblen mbstowcs mbtowc qsort quick_exit rand realloc srand strtod strtof strtol strtold
strtoll strtoul strtoull system wcstombs wctomb div_t ldiv_t lldiv_t EXIT_FAILURE EXIT_SUCCESS RAND_MAX MB_CUR_MAX
memchr memcmp memcpy memmove memset strcat strchr strcmp strcoll strcpy strcspn strerror strlen strncat strncmp
strncpy strpbrk strrchr strspn strstr strtok strxfrm
printf fprintf sprintf snprintf scanf fscanf sscanf puts fputs gets fgets putchar getchar putc getc fputc fgetc
fopen fclose fread fwrite fflush fseek ftell rewind remove rename tmpfile tmpnam perror setbuf setvbuf ungetc
feof ferror clearerr vprintf vfprintf vsprintf vsnprintf FILE EOF BUFSIZ stdin stdout stderr fpos_t fgetpos fsetpos
acos asin atan atan2 cos sin tan cosh sinh tanh exp exp2 expm1 frexp ldexp log log10 log1p log2 logb modf pow sqrt
cbrt hypot ceil floor fabs fmod round lround llround trunc rint lrint nearbyint remainder remquo copysign nan fma
fmax fmin fdim erf erfc lgamma tgamma scalbn scalbln ilogb nextafter nexttoward isnan isinf isfinite isnormal
signbit fpclassify HUGE_VAL INFINITY NAN float_t double_t
assert errno EDOM ERANGE EILSEQ setjmp longjmp jmp_buf signal raise sig_atomic_t va_list va_start va_arg va_end
va_copy bool true false int8_t int16_t int32_t int64_t uint8_t uint16_t uint32_t uint64_t intptr_t uintptr_t
intmax_t uintmax_t INT_MAX INT_MIN UINT_MAX LONG_MAX LONG_MIN CHAR_BIT SIZE_MAX PTRDIFF_MAX FLT_EPSILON DBL_EPSILON
FLT_MAX DBL_MAX FLT_MIN DBL_MIN time clock difftime mktime asctime ctime gmtime localtime strftime time_t clock_t
CLOCKS_PER_SEC isalnum isalpha isblank iscntrl isdigit isgraph islower isprint ispunct isspace isupper isxdigit
tolower toupper setlocale localeconv static_assert alignas alignof noreturn complex imaginary I""".split())
PY_MODULES = frozenset(getattr(sys, "stdlib_module_names", ())) | {
    "numpy", "scipy", "cffi", "pycparser", "jinja2", "markupsafe", "pytest", "hypothesis", "derive", "luforge",
    "setuptools", "pip", "site", "sitecustomize", "usercustomize", "conftest", "__main__", "__init__"}
# GCC/Clang keywords that open a line before a name in guarded code (`typedef T NAME_vec __attribute__((...))`):
# the compiler's own, never a symbol a kernel defines
GNU_KEYWORDS = frozenset({"__attribute__"})
SIGNIFICANT = 31    # C99 5.2.4.1: external identifiers are guaranteed 31 significant characters

_DEFINE = re.compile(r"^#\s*(?:define|ifndef|ifdef|undef)\s+([A-Za-z_]\w*)", re.M)
_FUNCTION = re.compile(r"^(?![#/ \t{}])[^(;=\n]*?\b([A-Za-z_]\w*)[ \t]*\(", re.M)
_COMMENT = re.compile(r"/\*.*?\*/|//[^\n]*|\"(?:\\.|[^\"\\])*\"", re.S)
_TOKEN = re.compile(r"[A-Za-z_]\w*")


@dataclass(frozen=True)
class Symbols:
    kernel: str
    macros: frozenset[str]
    functions: frozenset[str]
    module: str
    tokens: frozenset[str]         # every identifier in the code, for macro clashes with other kernels

    @property
    def c_symbols(self) -> frozenset[str]:
        return self.macros | self.functions


def symbols_of(name: str, files: tuple[tuple[str, str], ...]) -> Symbols:
    """What one kernel emits, read from its emitted text: macros defined or tested, file-scope functions, and
    the Python module; nothing is listed by hand, so a new kind of routine or macro is covered when emitted."""
    macros, functions, tokens, module = set(), set(), set(), name
    for fname, text in files:
        if fname.endswith((".c", ".h")):
            code = _COMMENT.sub(" ", text).replace("\\\n", " ")   # continued lines (a long #if) joined
            macros |= set(_DEFINE.findall(code))
            functions |= {f for f in _FUNCTION.findall(code) if f not in C_KEYWORDS | GNU_KEYWORDS}
            tokens |= set(_TOKEN.findall(code))
        elif fname.endswith(".py"):
            module = fname[:-3]
    macros -= {"__cplusplus"}
    return Symbols(name, frozenset(macros), frozenset(functions), module, frozenset(tokens))


def _owned(name: str, sym: str) -> bool:
    return any(sym == p or sym.startswith(p + "_") for p in (name, name.upper()))


def _forbidden(sym: str) -> str | None:
    if sym in C_KEYWORDS:
        return "a C keyword"
    if sym in CXX_KEYWORDS:
        return "a C++ keyword (the header is included from C++ too)"
    if sym.startswith("__") or (sym.startswith("_") and len(sym) > 1 and sym[1].isupper()):
        return "a reserved identifier (C11 7.1.3: two underscores, or an underscore and a capital)"
    if sym.startswith("_"):
        return "reserved at file scope (C11 7.1.3: a leading underscore)"
    if sym in C_LIBRARY:
        return "a name of the C standard library or <stddef.h>"
    return None


def check(kernels: list[tuple[str, tuple[tuple[str, str], ...]]]) -> tuple[list[str], list[str]]:
    """kernels: (name, emitted files). Returns (errors, warnings), one line each, naming the kernels and the
    symbol. Errors: a forbidden name, a symbol outside its kernel's space, or a clash between two kernels."""
    errors, warnings = [], []
    table = [symbols_of(name, files) for name, files in kernels]
    for s in table:
        why = _forbidden(s.kernel)
        if why:
            errors.append(f"kernel '{s.kernel}': the name is {why}; choose another")
        elif s.kernel in PY_MODULES or s.module in PY_MODULES:
            errors.append(f"kernel '{s.kernel}': its NumPy twin {s.module}.py would shadow the Python module "
                          f"'{s.module}' for every script in that directory; choose another name")
        elif keyword.iskeyword(s.module):
            errors.append(f"kernel '{s.kernel}': {s.module}.py cannot be imported ('{s.module}' is a Python "
                          f"keyword); choose another name")
        if why:
            continue
        for sym in sorted(s.c_symbols):
            w = _forbidden(sym)
            if w:
                errors.append(f"kernel '{s.kernel}': emits {sym}, which is {w}; choose another name")
            elif not _owned(s.kernel, sym):
                errors.append(f"kernel '{s.kernel}': emits {sym}, outside its namespace {s.kernel}_* / "
                              f"{s.kernel.upper()}_* (a luforge defect: please report it)")
        long = sorted(sym for sym in s.functions if len(sym) > SIGNIFICANT)
        if long:
            warnings.append(f"kernel '{s.kernel}': {len(long)} symbol(s) longer than {SIGNIFICANT} characters, "
                            f"e.g. {long[0]}; some embedded linkers keep only {SIGNIFICANT} significant "
                            f"characters (C99 5.2.4.1)")
    for i, a in enumerate(table):
        for b in table[i + 1:]:
            shared = sorted(a.c_symbols & b.c_symbols)
            if shared:
                errors.append(f"kernels '{a.kernel}' and '{b.kernel}' both emit {', '.join(shared[:3])}; a build "
                              f"with both fails; rename one")
                continue
            for x, y in ((a, b), (b, a)):
                hit = sorted(x.macros & (y.tokens - y.macros))
                if hit:
                    errors.append(f"kernel '{x.kernel}' defines the macro {hit[0]}, which kernel '{y.kernel}' "
                                  f"uses as a name; a build with both fails; rename one")
                    break
    return errors, warnings
