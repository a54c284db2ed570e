/*
 * ccb.h - portable board core of the clampcore wire protocol, version 1.
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
 */
#ifndef CCB_H
#define CCB_H

#include <stddef.h>
#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

/* ---- Protocol constants (§2, §3) -------------------------------------- */
#define CCB_PROTOCOL_VERSION 1u
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
#define CCB_HELLO_PAYLOAD 54u
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
#define CCB_MSG_HELLO 0x81u
#define CCB_MSG_SAMPLE 0x82u
#define CCB_MSG_STATUS 0x83u

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
/* The board sends HELLO, STATUS and SAMPLE; HELLO is the longest for <= 19 inputs. */
#define CCB_TX_BUF CCB_WIRE_LEN(CCB_HELLO_PAYLOAD)

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
} ccb_board;

/* Returns CCB_OK, or CCB_E_ARG if info or port is unusable (channel counts,
 * bits, ranges, missing functions).  Writes nothing to the DAC. */
uint8_t ccb_init(ccb_board *b, const ccb_board_info *info, const ccb_port *port);
void ccb_feed(ccb_board *b, const uint8_t *data, size_t len);
void ccb_tick(ccb_board *b);
uint8_t ccb_state(const ccb_board *b);
uint32_t ccb_rate_hz(const ccb_board *b); /* 0 until configured */
void ccb_get_status(const ccb_board *b, ccb_status *out);

#ifdef __cplusplus
}
#endif

#endif /* CCB_H */
