/* A plain textbook LU with partial (row) pivoting, written by hand as a firmware engineer would: one function,
   int indices, column-major float, the same ABI and return codes as a generated pivoted float kernel.
   It is the yardstick for the size, stack and instruction figures of `bench/firmware.py`; not used by luforge.
   Deliberately plain: no restrict, no unrolling, the loops a textbook prints. */
#include <stddef.h>

int textbook_lu(int n, float *a, int lda, int *ipiv)
{
    int i, j, k, info = 0;
    if (n < 0) return -1;
    if (a == NULL && n > 0) return -2;
    if (lda < 1 || lda < n) return -3;
    if (ipiv == NULL && n > 0) return -4;
    for (k = 0; k < n; ++k) {
        /* the pivot: first entry of largest magnitude in column k, from the diagonal down */
        int p = k;
        float big = a[k + k * lda];
        if (big < 0) big = -big;
        for (i = k + 1; i < n; ++i) {
            float v = a[i + k * lda];
            if (v < 0) v = -v;
            if (v > big) {
                big = v;
                p = i;
            }
        }
        ipiv[k] = p;
        /* exchange rows k and p across the whole matrix */
        if (p != k) {
            for (j = 0; j < n; ++j) {
                const float t = a[k + j * lda];
                a[k + j * lda] = a[p + j * lda];
                a[p + j * lda] = t;
            }
        }
        /* the multipliers; an exactly zero pivot is recorded and its column left as it is */
        if (a[k + k * lda] != 0) {
            const float d = a[k + k * lda];
            for (i = k + 1; i < n; ++i) a[i + k * lda] /= d;
        } else if (info == 0) {
            info = k + 1;
        }
        /* rank-1 update of the trailing matrix */
        for (j = k + 1; j < n; ++j) {
            const float t = a[k + j * lda];
            for (i = k + 1; i < n; ++i) a[i + j * lda] -= a[i + k * lda] * t;
        }
    }
    return info;
}

/* Solve A X = B with the factors above: the interchanges, then forward and backward substitution. */
int textbook_lu_solve(int n, int nrhs, const float *lu, int lda, const int *ipiv, float *b, int ldb)
{
    int i, j, k;
    if (n < 0) return -1;
    if (nrhs < 0) return -2;
    if (lu == NULL && n > 0) return -3;
    if (lda < 1 || lda < n) return -4;
    if (ipiv == NULL && n > 0) return -5;
    for (i = 0; i < n; ++i)
        if (ipiv[i] < 0 || ipiv[i] >= n) return -5;
    if (b == NULL && n > 0 && nrhs > 0) return -6;
    if (ldb < 1 || ldb < n) return -7;
    for (j = 0; j < nrhs; ++j) {
        float *x = b + j * ldb;
        for (k = 0; k < n; ++k) {
            const int p = ipiv[k];
            if (p != k) {
                const float t = x[k];
                x[k] = x[p];
                x[p] = t;
            }
        }
        for (k = 0; k < n; ++k)
            for (i = k + 1; i < n; ++i) x[i] -= lu[i + k * lda] * x[k];
        for (k = n - 1; k >= 0; --k) {
            x[k] /= lu[k + k * lda];
            for (i = 0; i < k; ++i) x[i] -= lu[i + k * lda] * x[k];
        }
    }
    return 0;
}
