/*
 * Two-tracer pulse through a packed soil column: the C twin of
 * honing.api.demo.simulate_tracer_test.
 *
 * Chloride (conservative) and a sorbing, decaying solute are fed together. Each follows 1-D
 * advection-dispersion with linear sorption (retardation R) and first-order decay (lambda,
 * in both phases), D = dispersivity * v:
 *
 *     dC/dt = (D/R) d2C/dx2 - (v/R) dC/dx - lambda C
 *
 * chloride with R = 1 and lambda = 0, the solute with the given R and lambda: the same
 * solver runs once per species.
 * First-type inlet C(0, t) = 1 while the pulse lasts, 0 after; dC/dx = 0 at the outlet.
 * Nodes every dx = L / CELLS, central differences, Crank-Nicolson steps with the inlet value
 * averaged over each step; each step solves the tridiagonal system by the Thomas algorithm.
 *
 * Usage:
 *   column VELOCITY DISPERSIVITY RETARDATION DECAY    writes the outputs JSON to stdout
 *   column                                            reads HONING_P_velocity, ... and
 *                                                     writes to $HONING_OUTPUTS (honing worker)
 * Units: m/d, m, -, 1/d. Output: {"chloride_10cm": [...], "chloride_20cm": [...],
 * "chloride_30cm": [...], "solute_10cm": [...], "solute_20cm": [...], "solute_30cm": [...]},
 * C/C0 at t = 0.1, 0.2, ..., 2.0 d. Build: cc -O2 -o column column.c -lm
 */
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#define LENGTH 0.40        /* column length, m */
#define CELLS 200          /* grid intervals: dx = 2 mm */
#define TIME_STEP 0.002    /* d */
#define PULSE 0.25         /* inlet pulse duration, d */
#define STEPS_PER_SAMPLE 50 /* samples every 0.1 d */
#define SAMPLES 20
#define PROBES 3
#define SPECIES 2           /* chloride, then the solute */
#define CHANNELS (SPECIES * PROBES)

static const int probe_node[PROBES] = {50, 100, 150}; /* 0.10, 0.20, 0.30 m */
static const char *channel_name[CHANNELS] = {
    "chloride_10cm", "chloride_20cm", "chloride_30cm",
    "solute_10cm", "solute_20cm", "solute_30cm",
};

static int parse(const char *text, const char *what, double *out) {
    char *end;
    if (text == NULL) {
        fprintf(stderr, "column: %s is missing\n", what);
        return 0;
    }
    errno = 0;
    *out = strtod(text, &end);
    if (errno != 0 || end == text || *end != '\0' || !isfinite(*out)) {
        fprintf(stderr, "column: %s is not a number: '%s'\n", what, text);
        return 0;
    }
    return 1;
}

/* One species: fills out[PROBES][SAMPLES] (parameters already checked). */
static void simulate(double v, double alpha, double r, double lambda,
                     double out[PROBES][SAMPLES]) {
    const int n = CELLS;
    const double dx = LENGTH / CELLS, h = 0.5 * TIME_STEP;
    const double a = alpha * v / (r * dx * dx), b = v / (2.0 * r * dx);
    /* Operator rows: lower (a + b; 2a on the outlet row), diagonal, upper (a - b). */
    double lo[CELLS], di[CELLS], up[CELLS], cp[CELLS], den[CELLS];
    double u[CELLS], rhs[CELLS];
    for (int i = 0; i < n; i++) {
        lo[i] = (i == n - 1) ? 2.0 * a : a + b;
        di[i] = -2.0 * a - lambda;
        up[i] = a - b;
        u[i] = 0.0;
    }
    /* Thomas factors of (I - h A), computed once. */
    den[0] = 1.0 - h * di[0];
    cp[0] = -h * up[0] / den[0];
    for (int i = 1; i < n; i++) {
        den[i] = (1.0 - h * di[i]) + h * lo[i] * cp[i - 1];
        cp[i] = (i < n - 1) ? -h * up[i] / den[i] : 0.0;
    }
    for (int k = 1; k <= SAMPLES * STEPS_PER_SAMPLE; k++) {
        double t0 = (k - 1) * TIME_STEP;
        double inlet = fmin(1.0, fmax(0.0, (PULSE - t0) / TIME_STEP));
        for (int i = 0; i < n; i++) {
            double s = (1.0 + h * di[i]) * u[i];
            if (i > 0) s += h * lo[i] * u[i - 1];
            if (i < n - 1) s += h * up[i] * u[i + 1];
            rhs[i] = s;
        }
        rhs[0] += TIME_STEP * (a + b) * inlet;
        /* Forward sweep (rhs becomes d'), then back substitution into u. */
        rhs[0] /= den[0];
        for (int i = 1; i < n; i++) rhs[i] = (rhs[i] + h * lo[i] * rhs[i - 1]) / den[i];
        u[n - 1] = rhs[n - 1];
        for (int i = n - 2; i >= 0; i--) u[i] = rhs[i] - cp[i] * u[i + 1];
        if (k % STEPS_PER_SAMPLE == 0)
            for (int p = 0; p < PROBES; p++) out[p][k / STEPS_PER_SAMPLE - 1] = u[probe_node[p] - 1];
    }
}

int main(int argc, char **argv) {
    static const char *names[4] = {"velocity", "dispersivity", "retardation", "decay"};
    double p[4], out[CHANNELS][SAMPLES];
    const char *path = NULL;
    if (argc == 5) {
        for (int i = 0; i < 4; i++)
            if (!parse(argv[i + 1], names[i], &p[i])) return 2;
    } else if (argc == 1) {
        char var[64];
        for (int i = 0; i < 4; i++) {
            snprintf(var, sizeof var, "HONING_P_%s", names[i]);
            if (!parse(getenv(var), var, &p[i])) return 2;
        }
        path = getenv("HONING_OUTPUTS");
    } else {
        fprintf(stderr, "usage: column [VELOCITY DISPERSIVITY RETARDATION DECAY]\n");
        return 2;
    }
    if (!(p[0] > 0 && p[1] > 0 && p[2] > 0 && p[3] >= 0)) {
        fprintf(stderr, "column: need velocity, dispersivity, retardation > 0 and decay >= 0\n");
        return 2;
    }
    simulate(p[0], p[1], 1.0, 0.0, out);           /* chloride: rows 0 .. PROBES - 1 */
    simulate(p[0], p[1], p[2], p[3], out + PROBES); /* the solute: the next PROBES rows */
    FILE *f = path ? fopen(path, "w") : stdout;
    if (f == NULL) {
        fprintf(stderr, "column: cannot write %s: %s\n", path, strerror(errno));
        return 1;
    }
    fputc('{', f);
    for (int q = 0; q < CHANNELS; q++) {
        fprintf(f, "%s\"%s\": [", q ? ", " : "", channel_name[q]);
        for (int j = 0; j < SAMPLES; j++) fprintf(f, "%s%.17g", j ? ", " : "", out[q][j]);
        fputc(']', f);
    }
    fputs("}\n", f);
    return (f == stdout || fclose(f) == 0) ? 0 : 1;
}
