/* Multiply-add peak in C for comparison with eaves' kernels: 16 independent 512-bit FMA chains
   per thread (GCC vector extensions), fma(acc, m, c) with m = c = 1 read at run time.
   Usage: c_peak f64|f32 THREADS SECONDS   -> prints "ops_per_s checksum_ok" */
#include <omp.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#define ACCS 16
#define STEPS 1024

typedef double v8d __attribute__((vector_size(64)));
typedef float v16f __attribute__((vector_size(64)));

#define BLOCK(VT, T, LANES)                                                   \
  static double block_##T(T m, T c, T seed) {                                 \
    VT acc[ACCS], zero = {0}, mv = zero + m, cv = zero + c;                   \
    for (int a = 0; a < ACCS; a++) acc[a] = zero + seed;                      \
    for (int i = 0; i < STEPS; i++)                                           \
      for (int a = 0; a < ACCS; a++) acc[a] = acc[a] * mv + cv;               \
    double s = 0;                                                             \
    for (int a = 0; a < ACCS; a++)                                            \
      for (int l = 0; l < LANES; l++) s += acc[a][l];                         \
    return s;                                                                 \
  }
BLOCK(v8d, double, 8)
BLOCK(v16f, float, 16)

int main(int argc, char **argv) {
  if (argc < 4) { fprintf(stderr, "usage: c_peak f64|f32 THREADS SECONDS\n"); return 2; }
  int f64 = strcmp(argv[1], "f64") == 0, threads = atoi(argv[2]);
  double seconds = atof(argv[3]), m = argc > 4 ? atof(argv[4]) : 1.0, best = 0;
  int lanes = f64 ? 8 : 16, ok = 1;
  omp_set_num_threads(threads);
  long reps = 64;
  for (int sample = 0; sample < 7; sample++) {
    double total = 0, t0 = omp_get_wtime();
#pragma omp parallel reduction(+ : total)
    for (long r = 0; r < reps; r++) {
      double seed = (double)((r & 7) + 1);
      total += f64 ? block_double(m, m, seed) : block_float((float)m, (float)m, (float)seed);
    }
    double dt = omp_get_wtime() - t0, expect = 0;
    for (long r = 0; r < reps; r++) expect += (double)ACCS * lanes * ((r & 7) + 1 + STEPS);
    ok &= total == expect * threads;
    double rate = 2.0 * STEPS * ACCS * lanes * reps * threads / dt;
    if (dt < seconds) { reps = (long)(reps * seconds * 1.2 / dt) + 1; sample--; continue; }
    if (rate > best) best = rate;
  }
  printf("%.6g %d\n", best, ok);
  return ok ? 0 : 1;
}
