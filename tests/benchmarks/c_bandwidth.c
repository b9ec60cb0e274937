/* Reference bandwidth loops for eaves' memory kernels: the same work, as a C programmer writes it.
 * Build: gcc -O3 -march=native -fopenmp c_bandwidth.c -o c_bandwidth
 * Run:   c_bandwidth KERNEL BYTES THREADS SECONDS   (KERNEL: read write copy axpy)
 * Prints: best bytes/s over 5 samples, and 1 if the checksum held. Each thread streams its own
 * slice; the repetitions run inside one parallel region, as eaves' kernels do. */
#include <omp.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

static double run(const char *k, double *a, double *b, long n, int threads, long reps, double *check) {
    double total = 0.0;
    double t0 = omp_get_wtime();
#pragma omp parallel num_threads(threads) reduction(+ : total)
    {
        int t = omp_get_thread_num();
        long lo = (t * n / threads) / 8 * 8, hi = t == threads - 1 ? n : ((t + 1) * n / threads) / 8 * 8;
        for (long r = 0; r < reps; r++) {
            if (!strcmp(k, "read")) {
                /* 32 independent partial sums (8 ymm or 4 zmm accumulators): one running sum would make
                 * the loop wait for the add latency, not for memory */
                double acc[32] = {0.0};
                long i = lo;
                for (; i + 32 <= hi; i += 32) {
#pragma omp simd
                    for (int j = 0; j < 32; j++) acc[j] += a[i + j];
                }
                double s = 0.0;
                for (; i < hi; i++) s += a[i];
                for (int j = 0; j < 32; j++) s += acc[j];
                total += s;
            } else if (!strcmp(k, "write")) {
                double v = 1.0 + r;
                for (long i = lo; i < hi; i++) a[i] = v;
            } else if (!strcmp(k, "copy")) {
                for (long i = lo; i < hi; i++) b[i] = a[i];
            } else {
                for (long i = lo; i < hi; i++) b[i] = 0.5 * a[i] + b[i];
            }
        }
        if (strcmp(k, "read")) total += (strcmp(k, "write") ? b[lo] : a[lo]);
    }
    *check = total;
    return omp_get_wtime() - t0;
}

int main(int argc, char **argv) {
    if (argc != 5) { fprintf(stderr, "usage: c_bandwidth KERNEL BYTES THREADS SECONDS\n"); return 2; }
    const char *k = argv[1];
    long bytes = atol(argv[2]);
    int threads = atoi(argv[3]);
    double min_seconds = atof(argv[4]);
    int arrays = (!strcmp(k, "copy") || !strcmp(k, "axpy")) ? 2 : 1;
    long n = bytes / 8 / arrays / 8 * 8;
    double *a = aligned_alloc(64, n * 8 + 64), *b = aligned_alloc(64, n * 8 + 64);
#pragma omp parallel for num_threads(threads) schedule(static)
    for (long i = 0; i < n; i++) { a[i] = 1.0; b[i] = 0.0; }
    double check;
    long reps = 1;
    while (run(k, a, b, n, threads, reps, &check) < min_seconds) reps *= 2;
    double best = 0.0;
    for (int s = 0; s < 5; s++) {
        double secs = run(k, a, b, n, threads, reps, &check);
        double per_elem = !strcmp(k, "axpy") ? 24.0 : !strcmp(k, "copy") ? 16.0 : 8.0;
        double rate = per_elem * n * reps / secs;
        if (rate > best) best = rate;
    }
    int ok = 1;
    if (!strcmp(k, "read")) ok = check == (double)n * reps;
    printf("%.6g %d\n", best, ok);
    return 0;
}
