/*
 * rig_port.h - the board core as the simulated rig runs it: one board on the in-memory
 * port (memory_port.h) behind plain-argument entry points that compiled Python
 * (numba, simulated_rig/ccore.py) calls once per tick.
 *
 * The rig owns the model cell, the clocks, the link and the fault injection; the board
 * (everything the host can see on the wire) is ccb_core.c.  Per tick the rig calls
 * ccb_rig_watchdog() (so that it knows the output in force over the period that ends
 * now), advances its cell, then ccb_rig_tick() with the fresh ADC count; between ticks
 * it hands every frame that arrived to ccb_rig_feed().  What the board sent waits in
 * the port until ccb_rig_take_tx().
 *
 * A rig is a byte buffer of ccb_rig_size() bytes (any 16-byte aligned memory).  Only
 * the functions below are exported from the shared library (it is built with
 * -fvisibility=hidden), so that it cannot clash with another build of the core loaded
 * into the same process.
 */
#ifndef CCB_RIG_PORT_H
#define CCB_RIG_PORT_H

#include "memory_port.h"

#ifdef __cplusplus
extern "C" {
#endif

#if defined(__GNUC__) || defined(__clang__)
#define CCB_RIG_API __attribute__((visibility("default")))
#else
#define CCB_RIG_API
#endif

/* ccb_rig_peek()'s fields, one int64 each (simulated_rig/ccore.py mirrors them). */
#define CCB_RIG_STATE 0        /* CCB_STATE_* */
#define CCB_RIG_COUNTER 1      /* samples taken in this run */
#define CCB_RIG_RATE_HZ 2      /* from CONFIGURE (0 before) */
#define CCB_RIG_WATCHDOG_US 3
#define CCB_RIG_FAULT_COUNTS 4 /* output 0's fault value */
#define CCB_RIG_HAVE_CMD 5     /* a command (v1) or a law without fault (law mode) in force */
#define CCB_RIG_TRIPPED 6      /* the link watchdog has tripped */
#define CCB_RIG_CMD_SEQ 7      /* seq of the COMMAND in force */
#define CCB_RIG_CMD_ANSWERS 8  /* the sample it answered (modulo 2^32) */
#define CCB_RIG_LAST_RX_US 9   /* board clock of the last frame that restarted the watchdog */
#define CCB_RIG_DAC 10         /* what the DAC (output 0) holds */
#define CCB_RIG_LAW_MODE 11    /* 1 after BOARD_RULES */
#define CCB_RIG_BAD_FRAMES 12
#define CCB_RIG_UNKNOWN 13
#define CCB_RIG_APPLIED 14     /* commands applied (law mode: laws received) */
#define CCB_RIG_TRIPS 15
#define CCB_RIG_TX_LOST 16     /* bytes the port's transmit buffer could not hold */
#define CCB_RIG_N 17

CCB_RIG_API size_t ccb_rig_size(void);
/* Initialise the board (ccb_init); CCB_OK or CCB_E_ARG. */
CCB_RIG_API uint8_t ccb_rig_init(void *rig, const ccb_board_info *info);
/* The board's clock reads now_us, then data[0:len] arrives on its serial line. */
CCB_RIG_API void ccb_rig_feed(void *rig, const uint8_t *data, size_t len, uint32_t now_us);
/* The board's clock reads now_us; the link watchdog is checked (ccb_check_watchdog). */
CCB_RIG_API void ccb_rig_watchdog(void *rig, uint32_t now_us);
/* The ADC reads adc and the clock now_us; one sample period (ccb_tick). */
CCB_RIG_API void ccb_rig_tick(void *rig, uint16_t adc, uint32_t now_us);
/* Move up to cap bytes the board sent to out; returns how many. */
CCB_RIG_API size_t ccb_rig_take_tx(void *rig, uint8_t *out, size_t cap);
/* The board's state as CCB_RIG_N int64 values (CCB_RIG_*), for the rig's clocks and its
 * ground-truth log; a real port never needs it. */
CCB_RIG_API void ccb_rig_peek(const void *rig, int64_t *out);
/* ccb_get_status() of the board. */
CCB_RIG_API void ccb_rig_status(const void *rig, ccb_status *out);

#ifdef __cplusplus
}
#endif

#endif /* CCB_RIG_PORT_H */
