/* A plain textbook LU with partial (row) pivoting, written by hand as a firmware engineer would: one function,
   int indices, column-major float, the same ABI and return codes as a generated pivoted float kernel.
   It is the yardstick for the size, stack and instruction figures of `bench/firmware.py`; not used by luforge. */
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
