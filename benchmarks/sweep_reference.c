/* The sweeps-schedule TD update of planner.learn_kernels.run_sweeps, written in C as a speed
 * reference: the same packed outcome table (20-byte records), the same splitmix64
 * stream, the same epsilon-greedy choice with random tie-breaking and the same
 * polynomial step size (one per sweep), so that both produce the same Q table bit for bit.
 *
 * Usage: sweep_reference DIR N_SWEEPS METHOD EPSILON DECAY HORIZON SEED
 * (HORIZON 0: step n^-DECAY in sweep n; else HORIZON / (HORIZON + n - 1)).
 * DIR holds offsets.bin (int64), table.bin (records), order.bin (int64), q.bin
 * (float64, overwritten with the result) and meta.bin (int64 n_actions). Prints the
 * seconds spent in the sweeps. */
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <time.h>

typedef struct __attribute__((packed)) {
    uint32_t threshold;
    int32_t code;
    int32_t first;
    double reward;
} record;

static const uint64_t GOLDEN = 0x9E3779B97F4A7C15ULL, MIX1 = 0xBF58476D1CE4E5B9ULL, MIX2 = 0x94D049BB133111EBULL;

static inline uint64_t next(uint64_t *s) {
    *s += GOLDEN;
    uint64_t z = *s;
    z = (z ^ (z >> 30)) * MIX1;
    z = (z ^ (z >> 27)) * MIX2;
    return z ^ (z >> 31);
}

static inline double uniform(uint64_t *s) { return (double)(next(s) >> 11) * (1.0 / 9007199254740992.0); }

static inline int greedy(const double *q, int64_t base, int n, uint64_t *s, double *best_out) {
    double best = q[base];
    int a = 0;
    for (int b = 1; b < n; b++) {
        double v = q[base + b];
        a = v > best ? b : a;
        best = v > best ? v : best;
    }
    int ties = 0;
    for (int b = 0; b < n; b++) ties += q[base + b] == best;
    if (ties > 1) {
        double u = uniform(s);
        int pick = (int)(u * ties);
        if (pick > ties - 1) pick = ties - 1;
        for (int b = 0; b < n; b++) {
            if (q[base + b] == best) {
                if (pick == 0) { a = b; break; }
                pick--;
            }
        }
    }
    *best_out = best;
    return a;
}

static inline int explore(int g, int n, double eps, uint64_t *s) {
    double u = uniform(s);
    if (u < eps) {
        int a = (int)(u / eps * n);
        return a < n - 1 ? a : n - 1;
    }
    return g;
}

static void *slurp(const char *dir, const char *name, size_t *bytes) {
    char path[4096];
    snprintf(path, sizeof path, "%s/%s", dir, name);
    FILE *f = fopen(path, "rb");
    if (!f) { perror(path); exit(2); }
    fseek(f, 0, SEEK_END);
    *bytes = (size_t)ftell(f);
    fseek(f, 0, SEEK_SET);
    void *buf = malloc(*bytes);
    if (fread(buf, 1, *bytes, f) != *bytes) { perror(path); exit(2); }
    fclose(f);
    return buf;
}

int main(int argc, char **argv) {
    if (argc != 8) { fprintf(stderr, "usage: %s DIR N_SWEEPS METHOD EPSILON DECAY HORIZON SEED\n", argv[0]); return 2; }
    const char *dir = argv[1];
    long n_sweeps = atol(argv[2]);
    int method = atoi(argv[3]);
    double eps = atof(argv[4]), decay = atof(argv[5]), horizon = atof(argv[6]);
    uint64_t s = strtoull(argv[7], NULL, 10);
    size_t nb;
    int64_t *offsets = slurp(dir, "offsets.bin", &nb);
    record *table = slurp(dir, "table.bin", &nb);
    int64_t *order = slurp(dir, "order.bin", &nb);
    size_t n_order = nb / sizeof(int64_t);
    double *q = slurp(dir, "q.bin", &nb);
    size_t n_q = nb / sizeof(double);
    int64_t *meta = slurp(dir, "meta.bin", &nb);
    int n = (int)meta[0];
    struct timespec t0, t1;
    clock_gettime(CLOCK_MONOTONIC, &t0);
    for (long sweep = 1; sweep <= n_sweeps; sweep++) {
        double alpha = horizon > 0.0 ? horizon / (horizon + (double)sweep - 1.0) : pow((double)sweep, -decay);
        for (size_t i = 0; i < n_order; i++) {
            int64_t k = order[i];
            uint32_t draw = (uint32_t)(next(&s) >> 32);
            int64_t j = offsets[k], last = offsets[k + 1] - 1;
            while (j < last && draw >= table[j].threshold) j++;
            record rec = table[j];
            if (rec.code < 0) { q[k] += alpha * (rec.reward - q[k]); continue; }
            int64_t base2 = (int64_t)rec.code * n;
            double best2;
            int g2 = greedy(q, base2, n, &s, &best2);
            if (method == 0) {
                int a2 = explore(g2, n, eps, &s);
                q[k] += alpha * (rec.reward + q[base2 + a2] - q[k]);
            } else {
                q[k] += alpha * (rec.reward + best2 - q[k]);
            }
        }
    }
    clock_gettime(CLOCK_MONOTONIC, &t1);
    printf("%.6f\n", (t1.tv_sec - t0.tv_sec) + 1e-9 * (t1.tv_nsec - t0.tv_nsec));
    char path[4096];
    snprintf(path, sizeof path, "%s/q.bin", dir);
    FILE *f = fopen(path, "wb");
    fwrite(q, sizeof(double), n_q, f);
    fclose(f);
    return 0;
}
