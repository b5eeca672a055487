// bench/small_driver.cpp: times one small fixed n and scalar per CASE line of cases.inc (written by bench/small.py):
// luforge's fixed-size kernels (constant-time and branching), its runtime-n kernel, Eigen's fixed-size
// PartialPivLU, LAPACK getrf/getrs and a textbook loop. Every contender copies its input once per call, every
// result is checked against getrf first, and repetitions are interleaved; the medians are printed.
#include <Eigen/Dense>

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <random>
#include <string>
#include <time.h>
#include <vector>

#include "small_textbook.h"

extern "C" {
#include "kernels.inc"
void dgetrf_(const int *, const int *, double *, const int *, int *, int *);
void sgetrf_(const int *, const int *, float *, const int *, int *, int *);
void dgetrs_(const char *, const int *, const int *, const double *, const int *, const int *, double *,
             const int *, int *, size_t);
void sgetrs_(const char *, const int *, const int *, const float *, const int *, const int *, float *,
             const int *, int *, size_t);
char *openblas_get_corename(void);
}

static const int POOL = 32;      // different matrices in turn, so no branch predictor learns one
static const int ROUNDS = 41;

static inline void sink(const void *p) { asm volatile("" : : "g"(p) : "memory"); }

static double now_ns()
{
    timespec ts;
    clock_gettime(CLOCK_THREAD_CPUTIME_ID, &ts);   // CPU time of this thread: other work on a shared machine does not count
    return ts.tv_sec * 1e9 + ts.tv_nsec;
}

template <class F> static double per_call(F &&f, int calls)
{
    const double t0 = now_ns();
    for (int i = 0; i < calls; ++i) f(i);
    return (now_ns() - t0) / calls;
}

static double median(std::vector<double> v)
{
    std::sort(v.begin(), v.end());
    return v[v.size() / 2];
}

template <class T> struct Lapack;
template <> struct Lapack<double> {
    static void getrf(int n, double *a, int *ipiv, int *info) { dgetrf_(&n, &n, a, &n, ipiv, info); }
    static void getrs(int n, const double *a, const int *ipiv, double *b)
    {
        int one = 1, info;
        dgetrs_("N", &n, &one, a, &n, ipiv, b, &n, &info, 1);
    }
    static int tb(int n, double *a, int *ipiv) { return tb_dgetrf(n, a, n, ipiv); }
    static void tbs(int n, const double *a, const int *ipiv, double *b) { tb_dgetrs(n, a, n, ipiv, b); }
};
template <> struct Lapack<float> {
    static void getrf(int n, float *a, int *ipiv, int *info) { sgetrf_(&n, &n, a, &n, ipiv, info); }
    static void getrs(int n, const float *a, const int *ipiv, float *b)
    {
        int one = 1, info;
        sgetrs_("N", &n, &one, a, &n, ipiv, b, &n, &info, 1);
    }
    static int tb(int n, float *a, int *ipiv) { return tb_sgetrf(n, a, n, ipiv); }
    static void tbs(int n, const float *a, const int *ipiv, float *b) { tb_sgetrs(n, a, n, ipiv, b); }
};

static int failures = 0;

template <class T> static void check(const char *what, const char *who, int n, const T *got, const T *want, int len)
{
    const double eps = std::numeric_limits<T>::epsilon();
    double big = 1, worst = 0;
    for (int i = 0; i < len; ++i) big = std::max(big, (double)std::fabs(want[i]));
    for (int i = 0; i < len; ++i) worst = std::max(worst, (double)std::fabs(got[i] - want[i]));
    if (!(worst <= 64.0 * n * eps * big)) {
        std::printf("MISMATCH %s %s n=%d: max difference %.3g from getrf/getrs\n", what, who, n, worst);
        ++failures;
    }
}

typedef int (*FixedFactorD)(double *, int, int *);

template <class T, int N, class FF, class FS, class BF, class BS, class RF, class RS>
static void run(const char *tname, FF fixed, FS fixed_solve, BF branch, BS branch_solve, RF runtime, RS runtime_solve)
{
    typedef Eigen::Matrix<T, N, N> Mat;
    typedef Eigen::Matrix<T, N, 1> Vec;
    const int NN = N * N;
    std::mt19937_64 gen(20261202 + N);
    std::uniform_real_distribution<double> dist(-1.0, 1.0);
    std::vector<T> in(POOL * NN), rhs(POOL * N), ref(POOL * NN), xref(POOL * N);
    std::vector<int> pref(POOL * N);
    for (auto &v : in) v = (T)dist(gen);
    for (auto &v : rhs) v = (T)dist(gen);
    for (int m = 0; m < POOL; ++m) {
        int info;
        std::memcpy(&ref[m * NN], &in[m * NN], NN * sizeof(T));
        Lapack<T>::getrf(N, &ref[m * NN], &pref[m * N], &info);
        std::memcpy(&xref[m * N], &rhs[m * N], N * sizeof(T));
        Lapack<T>::getrs(N, &ref[m * NN], &pref[m * N], &xref[m * N]);
    }
    // each contender's own factors of every pool matrix, for its solve; checked against getrf
    const char *names[] = {"luforge", "luforge-branching", "luforge-runtime-n", "eigen", "lapack", "textbook"};
    const int C = 6;
    std::vector<T> lu[C];
    std::vector<int> piv[C];
    std::vector<Eigen::PartialPivLU<Mat>> eig(POOL);
    for (int c = 0; c < C; ++c) {
        lu[c] = in;
        piv[c].assign(POOL * N, 0);
        for (int m = 0; m < POOL; ++m) {
            T *a = &lu[c][m * NN];
            int *p = &piv[c][m * N], info = 0;
            switch (c) {
            case 0: fixed(a, N, p); break;
            case 1: branch(a, N, p); break;
            case 2: runtime(N, a, N, p); break;
            case 3:
                eig[m].compute(Eigen::Map<const Mat>(&in[m * NN]));
                std::memcpy(a, eig[m].matrixLU().data(), NN * sizeof(T));
                break;
            case 4:
                Lapack<T>::getrf(N, a, p, &info);
                for (int k = 0; k < N; ++k) --p[k];
                break;
            case 5: Lapack<T>::tb(N, a, p); break;
            }
            check<T>("factor", names[c], N, a, &ref[m * NN], NN);
            for (int k = 0; c != 3 && k < N; ++k)
                if (p[k] != pref[m * N + k] - 1) {
                    std::printf("MISMATCH pivots %s n=%d\n", names[c], N);
                    ++failures;
                    break;
                }
        }
    }
    // factor: copy the input, factor it
    std::vector<double> ft[C], st[C];
    T w[NN];
    T x[N];
    int ip[N];
    Eigen::PartialPivLU<Mat> e;
    Vec ex;
    const int calls = std::max(16, 16384 / (N * N));
    for (int r = 0; r < ROUNDS; ++r) {
        ft[0].push_back(per_call([&](int i) { std::memcpy(w, &in[(i % POOL) * NN], sizeof w); fixed(w, N, ip); sink(w); }, calls));
        ft[1].push_back(per_call([&](int i) { std::memcpy(w, &in[(i % POOL) * NN], sizeof w); branch(w, N, ip); sink(w); }, calls));
        ft[2].push_back(per_call([&](int i) { std::memcpy(w, &in[(i % POOL) * NN], sizeof w); runtime(N, w, N, ip); sink(w); }, calls));
        ft[3].push_back(per_call([&](int i) { e.compute(Eigen::Map<const Mat>(&in[(i % POOL) * NN])); sink(&e); }, calls));
        ft[4].push_back(per_call([&](int i) { int info; std::memcpy(w, &in[(i % POOL) * NN], sizeof w); Lapack<T>::getrf(N, w, ip, &info); sink(w); }, calls));
        ft[5].push_back(per_call([&](int i) { std::memcpy(w, &in[(i % POOL) * NN], sizeof w); Lapack<T>::tb(N, w, ip); sink(w); }, calls));
    }
    // solve, one right-hand side: copy it, solve with the contender's own factors
    for (int c = 0; c < C; ++c)
        for (int m = 0; m < POOL; ++m) {
            T *b = x;
            std::memcpy(b, &rhs[m * N], sizeof x);
            const T *a = &lu[c][m * NN];
            const int *p = &piv[c][m * N];
            std::vector<int> p1(p, p + N);
            for (auto &v : p1) ++v;
            switch (c) {
            case 0: fixed_solve(1, a, N, p, b, N); break;
            case 1: branch_solve(1, a, N, p, b, N); break;
            case 2: runtime_solve(N, 1, a, N, p, b, N); break;
            case 3: ex = eig[m].solve(Eigen::Map<const Vec>(&rhs[m * N])); std::memcpy(b, ex.data(), sizeof x); break;
            case 4: Lapack<T>::getrs(N, a, p1.data(), b); break;
            case 5: Lapack<T>::tbs(N, a, p, b); break;
            }
            check<T>("solve", names[c], N, b, &xref[m * N], N);
        }
    std::vector<int> p1(POOL * N);
    for (int i = 0; i < POOL * N; ++i) p1[i] = piv[4][i] + 1;
    for (int r = 0; r < ROUNDS; ++r) {
        st[0].push_back(per_call([&](int i) { const int m = i % POOL; std::memcpy(x, &rhs[m * N], sizeof x); fixed_solve(1, &lu[0][m * NN], N, &piv[0][m * N], x, N); sink(x); }, calls));
        st[1].push_back(per_call([&](int i) { const int m = i % POOL; std::memcpy(x, &rhs[m * N], sizeof x); branch_solve(1, &lu[1][m * NN], N, &piv[1][m * N], x, N); sink(x); }, calls));
        st[2].push_back(per_call([&](int i) { const int m = i % POOL; std::memcpy(x, &rhs[m * N], sizeof x); runtime_solve(N, 1, &lu[2][m * NN], N, &piv[2][m * N], x, N); sink(x); }, calls));
        st[3].push_back(per_call([&](int i) { const int m = i % POOL; ex = eig[m].solve(Eigen::Map<const Vec>(&rhs[m * N])); sink(ex.data()); }, calls));
        st[4].push_back(per_call([&](int i) { const int m = i % POOL; std::memcpy(x, &rhs[m * N], sizeof x); Lapack<T>::getrs(N, &lu[4][m * NN], &p1[m * N], x); sink(x); }, calls));
        st[5].push_back(per_call([&](int i) { const int m = i % POOL; std::memcpy(x, &rhs[m * N], sizeof x); Lapack<T>::tbs(N, &lu[5][m * NN], &piv[5][m * N], x); sink(x); }, calls));
    }
    for (int c = 0; c < C; ++c)
        std::printf("RESULT %s %d %s %.2f %.2f\n", tname, N, names[c], median(ft[c]), median(st[c]));
    std::fflush(stdout);
}

#define CASE(T, N, F, B, R) run<T, N>(#T, F, F##_solve, B, B##_solve, R, R##_solve);

int main()
{
    std::printf("OPENBLAS_CORE %s\n", openblas_get_corename());
    std::printf("EIGEN %d.%d.%d\n", EIGEN_WORLD_VERSION, EIGEN_MAJOR_VERSION, EIGEN_MINOR_VERSION);
#include "cases.inc"
    return failures ? 1 : 0;
}
