/*
 * ccb_law.h - the board's per-sample arithmetic: the current law evaluated at the
 * board's own fresh ADC count (protocol version 2, PROTOCOL.md "The current law").
 *
 * C99, no dynamic memory, no libc beyond <math.h>'s floorf/isfinite-free checks.
 * float32 throughout, one rounding per operation: compile with -ffp-contract=off
 * (no fused multiply-add), and the result equals the Python mirror
 * (firmware_protocol/boardlaw.py) bit for bit; vectors/law_v2.json demands it.
 *
 *   x = alpha - beta*adc + B(adc)*(alpha_b - beta_b*adc) [+ tr_alpha - tr_beta*adc]
 *   counts = clip(floor(clip(x, limit_lo, limit_hi) + 0.5), 0, dac_top)
 *
 * counts = floor(x + 1/2) exactly (PROTOCOL.md section 6), not floorf(x + 0.5f), which
 * rounds 0.49999997f up. An ADC count outside [adc_ok_lo, adc_ok_hi] advances neither
 * the spike detector nor threshold-and-reset (as the host's step).
 *
 * B is a table of the Mg2+ block that the host computes over the ADC range
 * (points 2^block_shift counts apart); the board interpolates it linearly.
 */
#ifndef CCB_LAW_H
#define CCB_LAW_H

#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

/* Flags of one sample (the per-sample flags byte of protocol v2). */
#define CCB_LAW_SPIKE 0x01u     /* the cell spiked (detected, or threshold-and-reset fired) */
#define CCB_LAW_RESET 0x02u     /* the reset law was applied at this sample */
#define CCB_LAW_LIMITED 0x04u   /* x was clipped to the current limit */
#define CCB_LAW_FAULT 0x08u     /* the fault value went out */
#define CCB_LAW_BAD_V 0x10u     /* ADC count outside the plausible range */
#define CCB_LAW_STALE 0x20u     /* no law, or the law in force outlived its lifetime */
#define CCB_LAW_ZERO 0x40u      /* the zero request is on */
#define CCB_LAW_NONFINITE 0x80u /* the law gave a non-finite value */

typedef struct {
    float alpha, beta, alpha_b, beta_b;
} ccb_law;

typedef struct {
    float limit_lo, limit_hi; /* the current limit, in DAC counts (as floats) */
    float tr_alpha, tr_beta;  /* threshold-and-reset: the reset law */
    int32_t dac_top;          /* 2^N_dac - 1 */
    int32_t fault_counts;     /* the DAC count for 0 pA */
    int32_t adc_ok_lo, adc_ok_hi; /* outside: implausible V, fault value out */
    int32_t spike_adc, rearm_adc; /* spike detection: threshold, re-arm below */
    int32_t tr_adc;           /* threshold-and-reset threshold; above the ADC top: off */
    int32_t tr_samples;       /* samples of reset law after a crossing */
    int32_t lifetime;         /* samples a law may stay in force after its own sample */
    int32_t block_shift;      /* Mg block table index = adc >> shift; -1: no blocked law */
} ccb_law_params;

typedef struct {
    int32_t armed;      /* spike detector armed */
    int32_t tr_remain;  /* reset samples still to apply */
    int64_t law_sample; /* sample the law in force was made for; -1: none */
    int32_t hold_zero;  /* 1: the zero request holds the fault value */
    ccb_law law;        /* the law in force */
} ccb_law_state;

/* No law, detector disarmed (it arms once adc < rearm_adc), zero request off. */
void ccb_law_reset(ccb_law_state *s);
/* Put a law made for sample `sample` in force (call at that sample). */
void ccb_law_set(ccb_law_state *s, const ccb_law *law, int64_t sample);
/* DAC count for sample k read as `adc`; *flags gets the CCB_LAW_* bits.
 * `table` may be NULL when block_shift < 0. */
uint16_t ccb_law_eval(const ccb_law_params *p, ccb_law_state *s, const float *table,
                      uint16_t adc, int64_t k, uint8_t *flags);

#ifdef __cplusplus
}
#endif
#endif /* CCB_LAW_H */
