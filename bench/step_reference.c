/* The typical experiment's step written out by hand in C: the reference of
 * bench/bench_engine.py for what one sample of the same maths costs without the
 * generic step's dispatch over element kinds.
 *
 * Elements, in the program's row order: leak; threshold_reset; a dual-exponential
 * synapse with a Poisson source; an exponential synapse with depression whose source is
 * the virtual neuron; two Ornstein-Uhlenbeck noise conductances; one LIF neuron. Each
 * formula, and the order of every floating-point operation, is the one of
 * clampcore/step.py and clampcore/elements/ (SplitMix64 and Box-Muller as in
 * clampcore/rng.py), so the currents equal the compiled step's; the benchmark checks
 * that before it times anything. Build: cc -std=c99 -O2 -ffp-contract=off -shared -fPIC
 * step_reference.c -lm (the benchmark does it).
 */
#include <math.h>
#include <stdint.h>

/* Parameters, filled by the benchmark from the program (bench_engine._reference_params). */
enum {
    DT_MS, MAX_CURRENT_PA, SPIKE_THRESHOLD_MV, SPIKE_HYSTERESIS_MV, V_FAULT_MV,
    LEAK_G_NS, LEAK_E_MV,
    TR_THRESHOLD_MV, TR_RESET_MV, TR_REFRACTORY_MS, TR_G_NS,
    AMPA_G_MAX_NS, AMPA_E_MV, AMPA_TAU_DECAY_MS, AMPA_TAU_RISE_MS, AMPA_RATE_HZ,
    VS_G_MAX_NS, VS_E_MV, VS_TAU_DECAY_MS, VS_U, VS_TAU_REC_MS,
    GE_MEAN_NS, GE_SD_NS, GE_TAU_MS, GE_E_MV,
    GI_MEAN_NS, GI_SD_NS, GI_TAU_MS, GI_E_MV,
    NRN_C_PF, NRN_GL_NS, NRN_EL_MV, NRN_VT_MV, NRN_RESET_MV, NRN_REFRACTORY_MS, NRN_BIAS_PA,
    N_REF_PARAMS
};

/* State: one double each; the four random streams are separate (uint64). */
enum {
    ARMED, TR_REMAIN, TR_COUNT, AMPA_A, AMPA_B, AMPA_EVENTS,
    VS_A, VS_U_LAST, VS_R_LAST, VS_LAST_MS, VS_EVENTS,
    GE_G, GE_SPARE, GE_HAS_SPARE, GI_G, GI_SPARE, GI_HAS_SPARE,
    NRN_V, NRN_LAST_SPIKE, NRN_SPIKED, NRN_COUNT, SPIKES, LAW_A_PA, LAW_G_NS,
    N_REF_STATE
};
enum { RNG_AMPA, RNG_GE, RNG_GI, N_REF_RNG };

#define G_FLOOR_NS 1e-12 /* clampcore/elements/synapse.py */
#define RING 1024        /* the cell-spike history (cell-driven synapses read it) */
#define PI 3.14159265358979323846 /* the double nearest pi, as Python's math.pi */

static uint64_t next_u64(uint64_t *s) { /* SplitMix64, Steele, Lea & Flood 2014 */
    uint64_t z = (*s += 0x9E3779B97F4A7C15ULL);
    z = (z ^ (z >> 30)) * 0xBF58476D1CE4E5B9ULL;
    z = (z ^ (z >> 27)) * 0x94D049BB133111EBULL;
    return z ^ (z >> 31);
}

static double uniform(uint64_t *s) { return (double)(next_u64(s) >> 11) / 9007199254740992.0; }

static double normal_cached(uint64_t *s, double *spare, double *has_spare) {
    if (*has_spare != 0.0) {
        *has_spare = 0.0;
        return *spare;
    }
    double u1 = 1.0 - uniform(s);
    double u2 = uniform(s);
    double radius = sqrt(-2.0 * log(u1));
    *spare = radius * sin(2.0 * PI * u2);
    *has_spare = 1.0;
    return radius * cos(2.0 * PI * u2);
}

static int poisson_count(uint64_t *s, double mean) {
    if (mean <= 0.0) return 0;
    double u = uniform(s);
    double p = exp(-mean);
    double cdf = p;
    int k = 0;
    while (u > cdf && p > 0.0) {
        k += 1;
        p *= mean / k;
        cdf += p;
    }
    return k;
}

static double ou(double x, double mean, double sd, double decay, double z) {
    return mean + (x - mean) * decay + sd * sqrt(1.0 - decay * decay) * z;
}

static double dual_exp_peak_factor(double tau_r, double tau_d) {
    double t_peak = tau_d * tau_r / (tau_d - tau_r);
    t_peak *= log(tau_d / tau_r);
    return 1.0 / (exp(-t_peak / tau_d) - exp(-t_peak / tau_r));
}

/* One sample: the command in pA for the measured v at sample n; each element's g and i. */
static double step(double v, long n, const double *p, double *s, uint64_t *rng,
                   const double *decay, double *ring, double *g, double *i) {
    double dt = p[DT_MS];
    double t_ms = n * dt;
    if (!isfinite(v) || fabs(v) > p[V_FAULT_MV]) return 0.0;
    /* spike detector */
    int detected = 0;
    if (s[ARMED] != 0.0) {
        if (v >= p[SPIKE_THRESHOLD_MV]) {
            s[ARMED] = 0.0;
            detected = 1;
        }
    } else if (v < p[SPIKE_THRESHOLD_MV] - p[SPIKE_HYSTERESIS_MV]) {
        s[ARMED] = 1.0;
    }
    /* threshold_reset */
    int clamping = s[TR_REMAIN] > 0.0;
    int imposed = 0;
    double total = 0.0;
    i[1] = 0.0;
    if (s[TR_REMAIN] <= 0.0 && v >= p[TR_THRESHOLD_MV]) {
        s[TR_COUNT] += 1.0;
        imposed = 1;
        s[TR_REMAIN] = ceil(p[TR_REFRACTORY_MS] / dt - 1e-9);
    }
    if (s[TR_REMAIN] > 0.0) {
        s[TR_REMAIN] -= 1.0;
        i[1] = -p[TR_G_NS] * (v - p[TR_RESET_MV]);
    }
    g[1] = (clamping || imposed) ? p[TR_G_NS] : 0.0;
    total += i[1];
    int spiked = imposed || (detected && !clamping);
    if (spiked) s[SPIKES] += 1.0;
    ring[n & (RING - 1)] = spiked ? 1.0 : 0.0;
    /* leak */
    g[0] = p[LEAK_G_NS];
    const double e_mV[6] = {p[LEAK_E_MV], 0.0, p[AMPA_E_MV], p[VS_E_MV], p[GE_E_MV], p[GI_E_MV]};
    /* dual-exponential synapse, Poisson source */
    int events = poisson_count(&rng[RNG_AMPA], p[AMPA_RATE_HZ] * dt * 1e-3);
    s[AMPA_A] *= decay[0];
    s[AMPA_B] *= decay[1];
    if (fabs(s[AMPA_A]) < G_FLOOR_NS && fabs(s[AMPA_B]) < G_FLOOR_NS) {
        s[AMPA_A] = 0.0;
        s[AMPA_B] = 0.0;
    }
    for (int e = 0; e < events; e++) {
        s[AMPA_EVENTS] += 1.0;
        double f = dual_exp_peak_factor(p[AMPA_TAU_RISE_MS], p[AMPA_TAU_DECAY_MS]);
        s[AMPA_A] += f * p[AMPA_G_MAX_NS];
        s[AMPA_B] += f * p[AMPA_G_MAX_NS];
    }
    g[2] = s[AMPA_A] - s[AMPA_B];
    /* exponential synapse with depression, the virtual neuron's spike of the last sample */
    events = s[NRN_SPIKED] != 0.0;
    s[VS_A] *= decay[2];
    if (fabs(s[VS_A]) < G_FLOOR_NS) s[VS_A] = 0.0;
    if (events) {
        double big_u = p[VS_U], u = big_u, r = 1.0;
        if (!isinf(s[VS_LAST_MS])) {
            double gap = t_ms - s[VS_LAST_MS];
            r = 1.0 + (s[VS_R_LAST] * (1.0 - s[VS_U_LAST]) - 1.0) * exp(-gap / p[VS_TAU_REC_MS]);
        }
        s[VS_U_LAST] = u;
        s[VS_R_LAST] = r;
        s[VS_LAST_MS] = t_ms;
        s[VS_EVENTS] += 1.0;
        s[VS_A] += p[VS_G_MAX_NS] * u * r / big_u;
    }
    g[3] = s[VS_A];
    /* two Ornstein-Uhlenbeck conductances */
    double z = normal_cached(&rng[RNG_GE], &s[GE_SPARE], &s[GE_HAS_SPARE]);
    s[GE_G] = ou(s[GE_G], p[GE_MEAN_NS], p[GE_SD_NS], decay[3], z);
    g[4] = s[GE_G] > 0.0 ? s[GE_G] : 0.0;
    z = normal_cached(&rng[RNG_GI], &s[GI_SPARE], &s[GI_HAS_SPARE]);
    s[GI_G] = ou(s[GI_G], p[GI_MEAN_NS], p[GI_SD_NS], decay[4], z);
    g[5] = s[GI_G] > 0.0 ? s[GI_G] : 0.0;
    /* the virtual LIF neuron (no synapse on it: its input is its bias) */
    double i_nrn = 0.0 + p[NRN_BIAS_PA];
    /* Python's round: to nearest, ties to even (the default rounding mode) */
    int refractory = (n - s[NRN_LAST_SPIKE]) < nearbyint(p[NRN_REFRACTORY_MS] / dt);
    double vn = s[NRN_V];
    if (!refractory) {
        double v_inf = p[NRN_EL_MV] + i_nrn / p[NRN_GL_NS];
        vn = v_inf + (vn - v_inf) * decay[5];
    }
    int nrn_spiked = !refractory && vn > p[NRN_VT_MV];
    if (nrn_spiked) {
        vn = p[NRN_RESET_MV];
        s[NRN_LAST_SPIKE] = n;
        s[NRN_COUNT] += 1.0;
    }
    s[NRN_V] = vn;
    s[NRN_SPIKED] = nrn_spiked ? 1.0 : 0.0;
    g[6] = 0.0;
    i[6] = 0.0;
    /* the cell's current law, summed as step.py does (board law mode reads it) */
    double a = 0.0, gs = 0.0;
    for (int r = 0; r < 6; r++) {
        if (r == 1) continue;
        a += g[r] * e_mV[r];
        gs += g[r];
    }
    s[LAW_A_PA] = a;
    s[LAW_G_NS] = gs;
    /* the cell's currents at v */
    i[0] = -g[0] * (v - p[LEAK_E_MV]);
    i[2] = -g[2] * 1.0 * (v - p[AMPA_E_MV]);
    i[3] = -g[3] * 1.0 * (v - p[VS_E_MV]);
    i[4] = -g[4] * (v - p[GE_E_MV]);
    i[5] = -g[5] * (v - p[GI_E_MV]);
    double cell = 0.0;
    for (int r = 0; r < 6; r++)
        if (r != 1) cell += i[r];
    total += cell;
    if (!isfinite(total)) return 0.0;
    if (fabs(total) > p[MAX_CURRENT_PA]) return total > 0 ? p[MAX_CURRENT_PA] : -p[MAX_CURRENT_PA];
    return total;
}

/* bench_engine's loop: V read cyclically from v_trace, the command of every sample in out. */
void reference_loop(const double *v_trace, long n_v, long n0, long n_samples, const double *p,
                    double *s, uint64_t *rng, const double *decay, double *g, double *i,
                    double *out) {
    static double ring[RING];
    for (long k = 0; k < n_samples; k++)
        out[k] = step(v_trace[k % n_v], n0 + k, p, s, rng, decay, ring, g, i);
}

int reference_sizes(int which) { return which == 0 ? N_REF_PARAMS : which == 1 ? N_REF_STATE : N_REF_RNG; }
