/* ccb_law.c - see ccb_law.h.  Mirrors firmware_protocol/boardlaw.py line for line. */
#include "ccb_law.h"

#include <math.h>

/* Build with -ffp-contract=off (gcc and clang): a fused multiply-add would round once
 * where the Python mirror rounds twice. */

void ccb_law_reset(ccb_law_state *s)
{
    s->armed = 0; /* arms below rearm_adc, as the host's step: no spike at a first sample */
    s->tr_remain = 0;
    s->law_sample = -1;
    s->hold_zero = 0;
    s->law.alpha = s->law.beta = s->law.alpha_b = s->law.beta_b = 0.0f;
}

void ccb_law_set(ccb_law_state *s, const ccb_law *law, int64_t sample)
{
    s->law = *law;
    s->law_sample = sample;
}

static float block_at(const float *table, int32_t adc, int32_t shift)
{
    int32_t i = adc >> shift;
    float frac = (float)(adc & ((1 << shift) - 1)) * (1.0f / (float)(1 << shift));
    float lo = table[i];
    return lo + frac * (table[i + 1] - lo);
}

uint16_t ccb_law_eval(const ccb_law_params *p, ccb_law_state *s, const float *table,
                      uint16_t adc_u, int64_t k, uint8_t *flags_out)
{
    int32_t adc = (int32_t)adc_u;
    unsigned flags = 0u;
    unsigned fault = 0u;
    int detected = 0, clamping, fired = 0, reset_on, bad_v;
    int32_t counts = p->fault_counts;

    /* An implausible count advances nothing (as the host's step): no spike, no reset. */
    bad_v = adc < p->adc_ok_lo || adc > p->adc_ok_hi;
    clamping = s->tr_remain > 0;
    reset_on = 0;
    if (!bad_v) {
        if (s->armed) {
            if (adc >= p->spike_adc) {
                s->armed = 0;
                detected = 1;
            }
        } else if (adc < p->rearm_adc) {
            s->armed = 1;
        }
        if (!clamping && adc >= p->tr_adc) {
            s->tr_remain = p->tr_samples;
            fired = 1;
        }
        reset_on = s->tr_remain > 0;
        if (reset_on) {
            s->tr_remain -= 1;
            flags |= CCB_LAW_RESET;
        }
    }
    if (fired || (detected && !clamping))
        flags |= CCB_LAW_SPIKE;

    if (s->hold_zero)
        fault = CCB_LAW_ZERO;
    else if (bad_v)
        fault = CCB_LAW_BAD_V;
    else if (s->law_sample < 0 || k - s->law_sample > (int64_t)p->lifetime)
        fault = CCB_LAW_STALE;
    if (!fault) {
        float a = (float)adc;
        float x = s->law.alpha - s->law.beta * a;
        if (p->block_shift >= 0)
            x = x + block_at(table, adc, p->block_shift) * (s->law.alpha_b - s->law.beta_b * a);
        if (reset_on)
            x = x + (p->tr_alpha - p->tr_beta * a);
        /* x - x is 0 for a finite x and NaN for an infinite or NaN one. */
        if (!(x - x == 0.0f)) {
            fault = CCB_LAW_NONFINITE;
        } else {
            float c;
            if (x < p->limit_lo) {
                x = p->limit_lo;
                flags |= CCB_LAW_LIMITED;
            } else if (x > p->limit_hi) {
                x = p->limit_hi;
                flags |= CCB_LAW_LIMITED;
            }
            /* floor(x + 1/2) exactly: x - floor(x) is exact in float32, x + 0.5f is not
             * (0.49999997f + 0.5f rounds to 1). */
            c = floorf(x);
            if (x - c >= 0.5f)
                c = c + 1.0f;
            if (c < 0.0f)
                counts = 0;
            else if (c > (float)p->dac_top)
                counts = p->dac_top;
            else
                counts = (int32_t)c;
        }
    }
    if (fault) {
        flags |= CCB_LAW_FAULT | fault;
        flags &= ~CCB_LAW_LIMITED;
    }
    *flags_out = (uint8_t)flags;
    return (uint16_t)counts;
}
