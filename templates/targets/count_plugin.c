/* QEMU TCG plugin written by luforge: counts the guest instructions, and those whose mnemonic is a floating-
   point one, executed between entries to two marker functions, and appends one line per window to a file. */
/* Built with the host cc against QEMU's plugin API version 1, declaring only the few entry points it uses,
   because Debian's QEMU ships neither plugins nor the qemu-plugin.h header. */
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

typedef uint64_t qemu_plugin_id_t;
typedef struct qemu_info_t qemu_info_t;
struct qemu_plugin_tb;
struct qemu_plugin_insn;
enum qemu_plugin_cb_flags { QEMU_PLUGIN_CB_NO_REGS, QEMU_PLUGIN_CB_R_REGS, QEMU_PLUGIN_CB_RW_REGS };
enum qemu_plugin_op { QEMU_PLUGIN_INLINE_ADD_U64 };
typedef void (*qemu_plugin_vcpu_udata_cb_t)(unsigned int vcpu_index, void *userdata);
typedef void (*qemu_plugin_vcpu_tb_trans_cb_t)(qemu_plugin_id_t id, struct qemu_plugin_tb *tb);
typedef void (*qemu_plugin_udata_cb_t)(qemu_plugin_id_t id, void *userdata);

void qemu_plugin_register_vcpu_tb_trans_cb(qemu_plugin_id_t id, qemu_plugin_vcpu_tb_trans_cb_t cb);
size_t qemu_plugin_tb_n_insns(const struct qemu_plugin_tb *tb);
struct qemu_plugin_insn *qemu_plugin_tb_get_insn(const struct qemu_plugin_tb *tb, size_t idx);
uint64_t qemu_plugin_insn_vaddr(const struct qemu_plugin_insn *insn);
char *qemu_plugin_insn_disas(const struct qemu_plugin_insn *insn);
void qemu_plugin_register_vcpu_insn_exec_inline(struct qemu_plugin_insn *insn, enum qemu_plugin_op op,
                                                void *ptr, uint64_t imm);
void qemu_plugin_register_vcpu_insn_exec_cb(struct qemu_plugin_insn *insn, qemu_plugin_vcpu_udata_cb_t cb,
                                            enum qemu_plugin_cb_flags flags, void *userdata);
void qemu_plugin_register_atexit_cb(qemu_plugin_id_t id, qemu_plugin_udata_cb_t cb, void *userdata);

__attribute__((visibility("default"))) int qemu_plugin_version = 1;

static uint64_t total, fp;              /* single vCPU: the test images run on one core */
static uint64_t begin_total, begin_fp;
static uint64_t mark_begin = UINT64_MAX, mark_end = UINT64_MAX;
static char prefixes[256];              /* space-separated mnemonic prefixes that name float instructions */
static FILE *out;

static int is_float(const char *disas)
{
    char word[64];
    size_t n = 0;
    const char *p, *q;
    /* the mnemonic is the first word after any leading address or encoding columns the disassembler adds */
    while (*disas == ' ' || *disas == '\t') disas++;
    while (disas[n] && disas[n] != ' ' && disas[n] != '\t' && n < sizeof word - 1) {
        word[n] = disas[n];
        n++;
    }
    word[n] = '\0';
    for (p = prefixes; *p; p = q) {
        size_t len;
        while (*p == ' ') p++;
        q = p;
        while (*q && *q != ' ') q++;
        len = (size_t)(q - p);
        if (len && strncmp(word, p, len) == 0) return 1;
    }
    return 0;
}

static void on_begin(unsigned int vcpu, void *udata)
{
    (void)vcpu; (void)udata;
    begin_total = total;
    begin_fp = fp;
}

static void on_end(unsigned int vcpu, void *udata)
{
    (void)vcpu; (void)udata;
    if (out) {
        fprintf(out, "window %llu %llu\n", (unsigned long long)(total - begin_total),
                (unsigned long long)(fp - begin_fp));
        fflush(out);
    }
}

static void on_translate(qemu_plugin_id_t id, struct qemu_plugin_tb *tb)
{
    size_t i, n = qemu_plugin_tb_n_insns(tb);
    (void)id;
    for (i = 0; i < n; i++) {
        struct qemu_plugin_insn *insn = qemu_plugin_tb_get_insn(tb, i);
        uint64_t pc = qemu_plugin_insn_vaddr(insn);
        char *d = qemu_plugin_insn_disas(insn);
        /* the marker snapshots run before the marker's first instruction is counted */
        if (pc == mark_begin) qemu_plugin_register_vcpu_insn_exec_cb(insn, on_begin, QEMU_PLUGIN_CB_NO_REGS, NULL);
        if (pc == mark_end) qemu_plugin_register_vcpu_insn_exec_cb(insn, on_end, QEMU_PLUGIN_CB_NO_REGS, NULL);
        qemu_plugin_register_vcpu_insn_exec_inline(insn, QEMU_PLUGIN_INLINE_ADD_U64, &total, 1);
        if (d && is_float(d)) qemu_plugin_register_vcpu_insn_exec_inline(insn, QEMU_PLUGIN_INLINE_ADD_U64, &fp, 1);
        free(d);
    }
}

static void on_exit_(qemu_plugin_id_t id, void *udata)
{
    (void)id; (void)udata;
    if (out) {
        fprintf(out, "total %llu %llu\n", (unsigned long long)total, (unsigned long long)fp);
        fclose(out);
        out = NULL;
    }
}

/* arguments: out=FILE, begin=ADDR, end=ADDR (hex), float=PREFIX:PREFIX... */
__attribute__((visibility("default")))
int qemu_plugin_install(qemu_plugin_id_t id, const qemu_info_t *info, int argc, char **argv)
{
    int i;
    (void)info;
    for (i = 0; i < argc; i++) {
        if (strncmp(argv[i], "out=", 4) == 0) out = fopen(argv[i] + 4, "w");
        else if (strncmp(argv[i], "begin=", 6) == 0) mark_begin = strtoull(argv[i] + 6, NULL, 16);
        else if (strncmp(argv[i], "end=", 4) == 0) mark_end = strtoull(argv[i] + 4, NULL, 16);
        else if (strncmp(argv[i], "float=", 6) == 0) {
            char *p;
            strncpy(prefixes, argv[i] + 6, sizeof prefixes - 1);
            for (p = prefixes; *p; p++)
                if (*p == ':') *p = ' ';
        } else {
            fprintf(stderr, "luforge count plugin: unknown argument %s\n", argv[i]);
            return -1;
        }
    }
    if (!out) {
        fprintf(stderr, "luforge count plugin: needs out=FILE\n");
        return -1;
    }
    qemu_plugin_register_vcpu_tb_trans_cb(id, on_translate);
    qemu_plugin_register_atexit_cb(id, on_exit_, NULL);
    return 0;
}
