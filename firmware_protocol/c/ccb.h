/*
 * ccb.h - portable board core of the clampcore wire protocol, version 1, plus the
 * law mode of version 2 (PROTOCOL.md §10): after BOARD_RULES the board evaluates the
 * current law queued for each sample at its own fresh ADC count (ccb_law.h).
 *
 * The normative description is firmware_protocol/PROTOCOL.md; section numbers
 * below refer to it.  C99, no dynamic allocation, no libc beyond memcpy/memset,
 * no board-specific code.  Every public name starts with ccb_ / CCB_.
 *
 * A port supplies four functions (ccb_port) and calls:
 *   ccb_init()  once,
 *   ccb_feed()  with every byte that arrives on the serial line,
 *   ccb_tick()  once per sample period while ccb_state() == CCB_STATE_RUNNING
 *               (the period is 1e6 / ccb_rate_hz() microseconds).
 * ccb_feed() and ccb_tick() must not interrupt each other: call both from the
 * main loop, or both from interrupts of the same priority.
 *
 * Lower layers (CRC, COBS, deframer, message encoders and parsers) are public
 * too, so that tests and other programs can use them on their own.
 *
 * Build options (define before including, the same for every file):
 *   CCB_RX_MAX_PAYLOAD  largest payload the board receives (default 254; a
 *                       smaller value saves RAM, longer frames count as bad).
 *   CCB_MAX_INPUTS, CCB_MAX_OUTPUTS  channel arrays (default 16 each).
 *   CCB_CRC_BITWISE     compute the CRC bit by bit instead of with a 512-byte table.
 *   CCB_LAW_QUEUE       laws the board can hold ahead (default 1024; a power of two,
 *                       at least 8, above the host's look-ahead in samples: lead_ms
 *                       10 ms is 200 samples at 20 kHz, 500 at 50 kHz).  RAM: 20 bytes
 *                       a law (4 float32 + its sample number + a bit), 20.1 KiB at 1024,
 *                       5 KiB at 256.  0 leaves law mode out: the board then ignores
 *                       the law messages as a version-1 board does (§5.5), and the host
 *                       runs it in current mode.
 *   CCB_BLOCK_POINTS    float32 points of the Mg block table (default 1025 = 4.0 KiB,
 *                       what the host sends for any ADC of 10 bits or more; 2 or more).
 *   CCB_RULES_QUEUE     law mode: live rule changes (RULES_AT) the board holds until their
 *                       sample (default 4, at least 1; 52 bytes each).
 *   CCB_SAMPLES_PER_FRAME  law mode: samples per SAMPLES frame (default 1, at most 47;
 *                       the byte budget of PROTOCOL.md §10.4).  The board sends a frame
 *                       when it holds this many samples, and what it holds before the
 *                       STATUS reply to STOP.  Each sample waits up to n - 1 periods:
 *                       the host's look-ahead must cover that too.
 *
 * Law mode needs <math.h>'s floorf (link with -lm) and ccb_law.c compiled without fused
 * multiply-add (gcc/clang: -ffp-contract=off), so that its results equal the host's.
 */
#ifndef CCB_H
#define CCB_H

#include <stddef.h>
#include <stdint.h>

#include "ccb_law.h"

#ifdef __cplusplus
extern "C" {
#endif

/* ---- Protocol constants (§2, §3) -------------------------------------- */
#define CCB_PROTOCOL_VERSION 2u
#define CCB_MAX_PAYLOAD 254u   /* type + seq + body + CRC, so COBS adds 1 byte */
#define CCB_MAX_WIRE (CCB_MAX_PAYLOAD + 2u) /* + COBS code byte + 0x00 delimiter */
#define CCB_MIN_PAYLOAD 5u     /* type (1) + seq (2) + CRC (2) */
#define CCB_MAX_CHANNELS 16u
#define CCB_IDENTITY_BYTES 16u

/* Worst-case COBS output for n input bytes (no delimiter), any n. */
#define CCB_COBS_MAX_ENCODED(n) ((n) + (n) / 254u + 1u)
/* Wire length (COBS + delimiter) of a payload of p <= CCB_MAX_PAYLOAD bytes. */
#define CCB_WIRE_LEN(p) ((p) + 2u)

/* Payload lengths of each message (§4). */
#define CCB_HELLO_PAYLOAD 61u
#define CCB_STATUS_PAYLOAD 51u
#define CCB_SAMPLE_PAYLOAD(n_in) (16u + 2u * (n_in))
#define CCB_CONFIGURE_PAYLOAD(n_out) (15u + 2u * (n_out))
#define CCB_COMMAND_PAYLOAD(n_out) (9u + 2u * (n_out))
#define CCB_EMPTY_PAYLOAD CCB_MIN_PAYLOAD

/* Message types (§3): host -> board high bit clear, board -> host set. */
#define CCB_MSG_GET_HELLO 0x01u
#define CCB_MSG_CONFIGURE 0x02u
#define CCB_MSG_START 0x03u
#define CCB_MSG_STOP 0x04u
#define CCB_MSG_COMMAND 0x05u
#define CCB_MSG_KEEPALIVE 0x06u
#define CCB_MSG_GET_STATUS 0x07u
#define CCB_MSG_LAWS 0x08u        /* version 2, §10.4 */
#define CCB_MSG_BOARD_RULES 0x09u
#define CCB_MSG_BLOCK_TABLE 0x0Au
#define CCB_MSG_ZERO 0x0Bu
#define CCB_MSG_RULES_AT 0x0Cu    /* new board rules from a named sample on, §10.4 */
#define CCB_MSG_HELLO 0x81u
#define CCB_MSG_SAMPLE 0x82u
#define CCB_MSG_STATUS 0x83u
#define CCB_MSG_SAMPLES 0x84u

/* Law mode's payloads (§10.4): SAMPLES of n samples, the BOARD_RULES body. */
#define CCB_SAMPLES_PAYLOAD(n) (15u + 5u * (n))
#define CCB_BOARD_RULES_BODY 48u
#define CCB_RULES_AT_BODY (4u + CCB_BOARD_RULES_BODY) /* the sample, u32, then the rules */

/* HELLO.capabilities bits (§4.1). */
#define CCB_CAP_LAW 0x01u /* evaluates the current law (§10): built with CCB_LAW_QUEUE > 0 */

/* Status bits (§4.2). */
#define CCB_STATUS_FAULT_OUTPUT 0x01u
#define CCB_STATUS_WATCHDOG 0x02u
#define CCB_STATUS_LATE 0x04u
#define CCB_STATUS_RX_ERROR 0x08u

/* Board states (§5). */
#define CCB_STATE_UNCONFIGURED 0u
#define CCB_STATE_READY 1u
#define CCB_STATE_RUNNING 2u

/* STATUS.result (§4.3). */
#define CCB_RESULT_OK 0u
#define CCB_RESULT_BAD_STATE 1u
#define CCB_RESULT_BAD_RATE 2u
#define CCB_RESULT_BAD_INPUTS 3u
#define CCB_RESULT_BAD_WATCHDOG 4u
#define CCB_RESULT_BAD_FAULT_VALUE 5u
#define CCB_RESULT_REPORT 0x80u

/* Why the deframer dropped a frame (ccb_deframer.last_error). */
#define CCB_FRAME_ERR_NONE 0u
#define CCB_FRAME_ERR_COBS 1u
#define CCB_FRAME_ERR_SHORT 2u
#define CCB_FRAME_ERR_LONG 3u
#define CCB_FRAME_ERR_CRC 4u

/* Status codes in ccb_result.status and parser returns. */
#define CCB_OK 0u
#define CCB_E_ARG 1u     /* bad argument (NULL, out-of-range value) */
#define CCB_E_SPACE 2u   /* output buffer too small */
#define CCB_E_COBS 3u    /* malformed COBS data */
#define CCB_E_TYPE 4u    /* payload is another message type */
#define CCB_E_LENGTH 5u  /* body length does not fit the message */
#define CCB_E_VERSION 6u /* protocol version other than CCB_PROTOCOL_VERSION */

#ifndef CCB_RX_MAX_PAYLOAD
#define CCB_RX_MAX_PAYLOAD CCB_MAX_PAYLOAD
#endif
#ifndef CCB_MAX_INPUTS
#define CCB_MAX_INPUTS CCB_MAX_CHANNELS
#endif
#ifndef CCB_MAX_OUTPUTS
#define CCB_MAX_OUTPUTS CCB_MAX_CHANNELS
#endif
#ifndef CCB_LAW_QUEUE
#define CCB_LAW_QUEUE 1024u
#endif
#ifndef CCB_BLOCK_POINTS
#define CCB_BLOCK_POINTS 1025u
#endif
#ifndef CCB_SAMPLES_PER_FRAME
#define CCB_SAMPLES_PER_FRAME 1u
#endif
#ifndef CCB_RULES_QUEUE
#define CCB_RULES_QUEUE 4u
#endif
/* The board sends HELLO, STATUS, SAMPLE and SAMPLES (of CCB_SAMPLES_PER_FRAME). */
#define CCB_TX_BUF_MIN CCB_WIRE_LEN(CCB_HELLO_PAYLOAD)
#if CCB_LAW_QUEUE > 0 && CCB_WIRE_LEN(CCB_SAMPLES_PAYLOAD(CCB_SAMPLES_PER_FRAME)) > CCB_TX_BUF_MIN
#define CCB_TX_BUF CCB_WIRE_LEN(CCB_SAMPLES_PAYLOAD(CCB_SAMPLES_PER_FRAME))
#else
#define CCB_TX_BUF CCB_TX_BUF_MIN
#endif

/* Result of the encoders: bytes written and a CCB_OK / CCB_E_* status. */
typedef struct ccb_result {
    size_t len;
    uint8_t status;
} ccb_result;

/* ---- CRC-16/CCITT-FALSE (poly 0x1021, init 0xFFFF, no reflection, xorout 0) */
uint16_t ccb_crc16_update(uint16_t crc, const uint8_t *data, size_t len);
uint16_t ccb_crc16(const uint8_t *data, size_t len); /* "123456789" -> 0x29B1 */

/* ---- COBS (Cheshire & Baker 1999); no delimiter in or out --------------- */
ccb_result ccb_cobs_encode(const uint8_t *src, size_t len, uint8_t *dst, size_t cap);
ccb_result ccb_cobs_decode(const uint8_t *src, size_t len, uint8_t *dst, size_t cap);

/* Whole frame [type][seq][body][crc] -> COBS -> 0x00 into out. */
ccb_result ccb_frame_encode(uint8_t type, uint16_t seq, const uint8_t *body, size_t body_len,
                            uint8_t *out, size_t cap);

/* ---- Streaming deframer (§2) ------------------------------------------ */
typedef struct ccb_deframer {
    uint8_t buf[CCB_RX_MAX_PAYLOAD]; /* payload of the frame being received */
    uint16_t fill;                   /* private */
    uint8_t left, zero, in_frame, drop; /* private: COBS decoding state */
    uint8_t last_error;              /* CCB_FRAME_ERR_* of the last bad frame */
    uint32_t good, bad;              /* frames accepted / dropped */
} ccb_deframer;

#define CCB_DEFRAME_BAD (-1)

void ccb_deframer_init(ccb_deframer *d);
/* Push one received byte.  Returns the payload length (>= 5, payload in d->buf,
 * valid until the next call) when it completes a good frame, CCB_DEFRAME_BAD when
 * it completes a frame that was dropped, 0 otherwise. */
int ccb_deframe_byte(ccb_deframer *d, uint8_t byte);

/* ---- Messages (§4) ---------------------------------------------------- */
typedef struct ccb_board_info { /* HELLO body */
    char identity[CCB_IDENTITY_BYTES]; /* ASCII, NUL padded */
    uint8_t adc_bits, dac_bits, n_inputs, n_outputs;
    int32_t adc_min_uV, adc_max_uV, dac_min_uV, dac_max_uV;
    uint32_t max_rate_hz, watchdog_min_us, watchdog_max_us;
    /* What the build can do (§4.1); ccb_init fills these from the build options, so a
     * port leaves them at 0: CCB_CAP_* bits, laws held ahead (CCB_LAW_QUEUE), Mg-blocked
     * groups evaluated, most samples per SAMPLES frame (CCB_SAMPLES_PER_FRAME). */
    uint8_t capabilities;
    uint32_t law_queue;
    uint8_t mg_groups, max_samples;
} ccb_board_info;

typedef struct ccb_status { /* STATUS body */
    uint8_t state, status, result;
    uint16_t ack_seq;
    uint32_t counter, bad_frames, unknown_messages, rejected, late_commands, missing_commands,
        watchdog_trips, commands_applied, rate_hz;
    uint8_t n_inputs;
    uint32_t watchdog_us;
} ccb_status;

typedef struct ccb_configure { /* CONFIGURE body */
    uint8_t version, n_inputs, n_outputs;
    uint32_t rate_hz, watchdog_us;
    uint16_t fault_counts[CCB_MAX_CHANNELS];
} ccb_configure;

typedef struct ccb_command { /* COMMAND header seq and body */
    uint16_t seq;
    uint8_t n_outputs;
    uint32_t answers_counter;
    uint16_t dac_counts[CCB_MAX_CHANNELS];
} ccb_command;

ccb_result ccb_encode_hello(uint16_t seq, const ccb_board_info *info, uint8_t *out, size_t cap);
ccb_result ccb_encode_status(uint16_t seq, const ccb_status *st, uint8_t *out, size_t cap);
ccb_result ccb_encode_sample(uint16_t seq, uint32_t counter, uint32_t clock_us, uint16_t cmd_seq,
                             uint8_t status, const uint16_t *adc, uint8_t n_in, uint8_t *out,
                             size_t cap);
/* SAMPLES (§10.4): `count` samples from `first`, each adc, dac (the count written for
 * it) and flags (ccb_law.h's CCB_LAW_* bits). */
ccb_result ccb_encode_samples(uint16_t seq, uint32_t first, uint32_t clock_us, uint8_t status,
                              uint8_t count, const uint16_t *adc, const uint16_t *dac,
                              const uint8_t *flags, uint8_t *out, size_t cap);
/* Parse a CRC-checked payload; return CCB_OK or CCB_E_TYPE/CCB_E_LENGTH/CCB_E_VERSION. */
uint8_t ccb_parse_configure(const uint8_t *payload, size_t len, ccb_configure *out);
uint8_t ccb_parse_command(const uint8_t *payload, size_t len, ccb_command *out);

/* ---- The board (§5) --------------------------------------------------- */
typedef struct ccb_port {
    void *ctx; /* passed back to every function */
    uint16_t (*read_adc)(void *ctx, uint8_t channel);
    void (*write_dac)(void *ctx, uint8_t channel, uint16_t counts);
    uint32_t (*micros)(void *ctx); /* free-running microsecond clock, wraps at 2^32 */
    void (*serial_write)(void *ctx, const uint8_t *data, size_t len);
} ccb_port;

#if CCB_LAW_QUEUE > 0
typedef struct ccb_law_board { /* law mode (§10); private */
    ccb_law_params params;          /* from BOARD_RULES (and CONFIGURE's fault value) */
    ccb_law_state state;            /* detector, reset, zero request, the law in force */
    int64_t k;                      /* samples taken since START, never wrapping */
    uint32_t late, ahead;           /* laws not queued: for a sample taken, beyond the queue */
    uint8_t on;                     /* BOARD_RULES came after the last CONFIGURE */
    uint8_t queued[CCB_LAW_QUEUE / 8u]; /* bit i: slot i holds the law for due[i] */
    uint32_t due[CCB_LAW_QUEUE];    /* sample number (modulo 2^32) of each slot's law */
    ccb_law queue[CCB_LAW_QUEUE];   /* slot = sample mod CCB_LAW_QUEUE */
    float table[CCB_BLOCK_POINTS];  /* Mg block table from BLOCK_TABLE */
    ccb_law_params next[CCB_RULES_QUEUE]; /* RULES_AT waiting for their sample, in arrival order */
    uint32_t next_at[CCB_RULES_QUEUE];
    uint8_t next_head, next_n;
    /* samples taken but not sent yet (CCB_SAMPLES_PER_FRAME to a SAMPLES frame) */
    uint16_t out_adc[CCB_SAMPLES_PER_FRAME], out_dac[CCB_SAMPLES_PER_FRAME];
    uint8_t out_flags[CCB_SAMPLES_PER_FRAME];
    uint8_t out_n, out_events;
    uint32_t out_first, out_clock_us;
} ccb_law_board;
#endif

typedef struct ccb_board { /* all fields private: use the functions below */
    ccb_board_info info;
    ccb_port port;
    ccb_deframer rx;
    uint8_t tx[CCB_TX_BUF];
    uint16_t tx_seq;
    uint8_t state, n_inputs, have_command, tripped, flags;
    uint32_t rate_hz, watchdog_us, counter, last_rx_us;
    uint16_t cmd_seq;
    uint32_t cmd_answers;
    uint16_t fault_counts[CCB_MAX_OUTPUTS];
    uint16_t adc[CCB_MAX_INPUTS];
    ccb_status stats; /* counters; state/status/result fields unused */
#if CCB_LAW_QUEUE > 0
    ccb_law_board law;
#endif
} ccb_board;

/* Returns CCB_OK, or CCB_E_ARG if info or port is unusable (channel counts,
 * bits, ranges, missing functions).  Writes nothing to the DAC. */
uint8_t ccb_init(ccb_board *b, const ccb_board_info *info, const ccb_port *port);
void ccb_feed(ccb_board *b, const uint8_t *data, size_t len);
void ccb_tick(ccb_board *b);
/* The watchdog check that ccb_tick() makes first, on its own: for a port that must know
 * the output in force before it samples (a simulator advancing its model cell over the
 * period that ends at this tick).  Calling it just before ccb_tick() changes nothing else. */
void ccb_check_watchdog(ccb_board *b);
uint8_t ccb_state(const ccb_board *b);
uint32_t ccb_rate_hz(const ccb_board *b); /* 0 until configured */
void ccb_get_status(const ccb_board *b, ccb_status *out);
/* Law mode: 1 after BOARD_RULES (until CONFIGURE), 0 otherwise or when built without it. */
uint8_t ccb_law_mode(const ccb_board *b);
/* Laws of this run not queued: for a sample already taken (late), and beyond the queue. */
void ccb_law_counts(const ccb_board *b, uint32_t *late, uint32_t *ahead);

#ifdef __cplusplus
}
#endif

#endif /* CCB_H */
