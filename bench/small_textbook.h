/* bench/small_textbook.h: the hand-written contender of `make bench` (see small_textbook.c). */
#ifndef SMALL_TEXTBOOK_H
#define SMALL_TEXTBOOK_H
#ifdef __cplusplus
extern "C" {
#endif
int tb_dgetrf(int n, double *a, int lda, int *ipiv);
void tb_dgetrs(int n, const double *lu, int lda, const int *ipiv, double *b);
int tb_sgetrf(int n, float *a, int lda, int *ipiv);
void tb_sgetrs(int n, const float *lu, int lda, const int *ipiv, float *b);
#ifdef __cplusplus
}
#endif
#endif
