/* bench/small_textbook.c: the loop a user would write by hand from a numerical-analysis text, for `make bench`:
   right-looking LU with partial pivoting on a column-major matrix, n at run time, branches where they skip work. */
#include "small_textbook.h"

#define TEXTBOOK(T, F, S)                                                                                   \
int F(int n, T *a, int lda, int *ipiv)                                                                    \
{                                                                                                         \
    int info = 0;                                                                                         \
    for (int k = 0; k < n; ++k) {                                                                         \
        int p = k;                                                                                        \
        T big = a[k + k * lda] < 0 ? -a[k + k * lda] : a[k + k * lda];                                    \
        for (int i = k + 1; i < n; ++i) {                                                                 \
            T v = a[i + k * lda] < 0 ? -a[i + k * lda] : a[i + k * lda];                                  \
            if (v > big) { big = v; p = i; }                                                              \
        }                                                                                                 \
        ipiv[k] = p;                                                                                      \
        if (p != k)                                                                                       \
            for (int j = 0; j < n; ++j) { T t = a[k + j * lda]; a[k + j * lda] = a[p + j * lda]; a[p + j * lda] = t; } \
        if (a[k + k * lda] == 0) { if (info == 0) info = k + 1; continue; }                               \
        for (int i = k + 1; i < n; ++i) a[i + k * lda] /= a[k + k * lda];                                 \
        for (int j = k + 1; j < n; ++j)                                                                   \
            for (int i = k + 1; i < n; ++i) a[i + j * lda] -= a[i + k * lda] * a[k + j * lda];            \
    }                                                                                                     \
    return info;                                                                                          \
}                                                                                                         \
void S(int n, const T *lu, int lda, const int *ipiv, T *b)                                                \
{                                                                                                         \
    for (int k = 0; k < n; ++k) { int p = ipiv[k]; if (p != k) { T t = b[k]; b[k] = b[p]; b[p] = t; } }    \
    for (int j = 0; j < n; ++j)                                                                           \
        for (int i = j + 1; i < n; ++i) b[i] -= lu[i + j * lda] * b[j];                                   \
    for (int j = n - 1; j >= 0; --j) {                                                                    \
        b[j] /= lu[j + j * lda];                                                                          \
        for (int i = 0; i < j; ++i) b[i] -= lu[i + j * lda] * b[j];                                       \
    }                                                                                                     \
}

TEXTBOOK(double, tb_dgetrf, tb_dgetrs)
TEXTBOOK(float, tb_sgetrf, tb_sgetrs)
