/*
 * fuzz_main.c - run a byte stream through the C deframer and through a running
 * board, in C loops; print one JSON line of counts.  Host tool for the fuzz test
 * and benchmark (firmware_protocol/fuzz.py builds the stream).
 *
 *   ccb_fuzz STREAM_FILE CHUNK_BYTES
 *
 * A third pass runs a board in law mode (PROTOCOL.md §10) on the same stream, with
 * LAWS and ZERO frames of arbitrary content (any float bits, any sample) woven in and
 * arbitrary ADC counts, so that AddressSanitizer sees the law queue and the block
 * table indexed by whatever arrives.
 *
 * Checks made here (exit status 2 if one fails): every frame the board sends,
 * whatever it was fed, deframes as a good frame; no frame accepted by the
 * deframer fails an independent bit-by-bit CRC.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "memory_port.h"

/* CRC-16/CCITT-FALSE bit by bit, independent of the core's table. */
static uint16_t crc_bitwise(const uint8_t *p, size_t n)
{
    uint16_t c = 0xFFFFu;
    size_t i;
    unsigned k;
    for (i = 0; i < n; i++) {
        c = (uint16_t)(c ^ ((uint16_t)p[i] << 8));
        for (k = 0; k < 8u; k++) {
            c = (c & 0x8000u) ? (uint16_t)((c << 1) ^ 0x1021u) : (uint16_t)(c << 1);
        }
    }
    return c;
}

static uint8_t *read_file(const char *path, size_t *len)
{
    FILE *f = fopen(path, "rb");
    uint8_t *buf;
    long size;
    if (f == NULL || fseek(f, 0, SEEK_END) != 0 || (size = ftell(f)) < 0 ||
        fseek(f, 0, SEEK_SET) != 0) {
        if (f != NULL) {
            fclose(f);
        }
        return NULL;
    }
    buf = (uint8_t *)malloc((size_t)size + 1u);
    if (buf == NULL || fread(buf, 1, (size_t)size, f) != (size_t)size) {
        free(buf);
        fclose(f);
        return NULL;
    }
    fclose(f);
    *len = (size_t)size;
    return buf;
}

/* Deframe whatever the board sent; count good and bad frames of its output. */
static void drain_board_output(ccb_mem_rig *rig, ccb_deframer *out_d, uint32_t *out_bad_crc)
{
    static uint8_t tx[CCB_MEM_TX_BYTES];
    size_t n = ccb_mem_take_tx(rig, tx, sizeof(tx)), i;
    for (i = 0; i < n; i++) {
        int m = ccb_deframe_byte(out_d, tx[i]);
        if (m > 0 && crc_bitwise(out_d->buf, (size_t)m - 2u) !=
                         (uint16_t)(out_d->buf[m - 2] | (out_d->buf[m - 1] << 8))) {
            (*out_bad_crc)++;
        }
    }
}

/* xorshift32 (Marsaglia 2003): arbitrary but repeatable law contents. */
static uint32_t next_random(uint32_t *x)
{
    *x ^= *x << 13;
    *x ^= *x >> 17;
    *x ^= *x << 5;
    return *x;
}

static void put_le32(uint8_t *p, uint32_t v)
{
    p[0] = (uint8_t)v;
    p[1] = (uint8_t)(v >> 8);
    p[2] = (uint8_t)(v >> 16);
    p[3] = (uint8_t)(v >> 24);
}

/* 3. A law-mode board: BOARD_RULES (block table on), then the stream with LAWS and ZERO
 * of arbitrary content between its chunks, one tick per chunk at an arbitrary count.
 * law_counts gets the ticks in law mode, the late laws and the laws beyond the queue. */
static void run_law_board(ccb_mem_rig *rig, const ccb_board_info *info, const uint8_t *data,
                          size_t len, size_t chunk, ccb_deframer *out_d, uint32_t *out_bad_crc,
                          uint32_t law_counts[3])
{
    static const uint8_t configure[14] = {1, 0xE8, 0x03, 0, 0, 2, 0x20, 0x4E, 0, 0,
                                          0, 0x80, 0, 0x80};
    uint8_t frame[CCB_MAX_WIRE], body[240], rules[CCB_BOARD_RULES_BODY];
    uint32_t x = 2463534242u, now_us = 0, i, late, ahead;
    size_t pos;
    ccb_result r;
    if (ccb_mem_rig_init(rig, info) != CCB_OK) {
        return;
    }
    r = ccb_frame_encode(CCB_MSG_CONFIGURE, 1, configure, sizeof(configure), frame, sizeof(frame));
    ccb_feed(&rig->board, frame, r.len);
    memset(body, 0, CCB_BOARD_RULES_BODY);
    put_le32(&body[4], 0x7F800000u);    /* limit_hi +inf: the DAC's range is the limit */
    put_le32(&body[16], 0u);            /* adc_ok_lo */
    put_le32(&body[20], 65535u);        /* adc_ok_hi */
    put_le32(&body[24], 40000u);        /* spike_adc */
    put_le32(&body[28], 30000u);        /* rearm_adc */
    put_le32(&body[32], 45000u);        /* tr_adc */
    put_le32(&body[36], 7u);            /* tr_samples */
    put_le32(&body[40], 3u);            /* lifetime */
    put_le32(&body[44], 6u);            /* block_shift: 1025 points for 16 bits */
    put_le32(&body[0], 0xFF800000u);    /* limit_lo -inf */
    memcpy(rules, body, sizeof(rules));
    for (pos = 0; pos < len; pos += chunk) {
        size_t n = len - pos < chunk ? len - pos : chunk;
        uint32_t pick = next_random(&x);
        if (ccb_state(&rig->board) != CCB_STATE_RUNNING || !ccb_law_mode(&rig->board)) {
            /* the stream stopped or reconfigured it: back to law mode, counts kept */
            ccb_law_counts(&rig->board, &late, &ahead);
            law_counts[1] += late;
            law_counts[2] += ahead;
            r = ccb_frame_encode(CCB_MSG_STOP, 2, NULL, 0, frame, sizeof(frame));
            ccb_feed(&rig->board, frame, r.len);
            r = ccb_frame_encode(CCB_MSG_BOARD_RULES, 2, rules, sizeof(rules), frame,
                                 sizeof(frame));
            ccb_feed(&rig->board, frame, r.len);
            r = ccb_frame_encode(CCB_MSG_START, 3, NULL, 0, frame, sizeof(frame));
            ccb_feed(&rig->board, frame, r.len);
        }
        ccb_feed(&rig->board, &data[pos], n);
        if (pick % 4u == 0u) { /* LAWS: 0..14 laws, blocked or not, late .. beyond */
            uint32_t count = next_random(&x) % 15u, blocked = next_random(&x) & 1u;
            uint32_t where = next_random(&x), first = rig->board.counter;
            if (where % 3u == 0u) {
                first -= 1u + (where >> 2) % 8u; /* late */
            } else if (where % 3u == 1u) {
                first += (where >> 2) % 40u; /* due soon */
            } else {
                first += CCB_LAW_QUEUE - 6u + (where >> 2) % 12u; /* at the queue's end */
            }
            put_le32(&body[0], rig->board.counter);
            put_le32(&body[4], first);
            body[8] = (uint8_t)count;
            body[9] = (uint8_t)blocked;
            for (i = 0; i < count * (blocked ? 4u : 2u); i++) {
                put_le32(&body[10u + 4u * i], next_random(&x));
            }
            r = ccb_frame_encode(CCB_MSG_LAWS, 4, body, 10u + 4u * i, frame, sizeof(frame));
            ccb_feed(&rig->board, frame, r.len);
        } else if (pick % 64u == 1u) {
            body[0] = (uint8_t)(next_random(&x) & 1u);
            r = ccb_frame_encode(CCB_MSG_ZERO, 5, body, 1, frame, sizeof(frame));
            ccb_feed(&rig->board, frame, r.len);
        }
        now_us += 1000u;
        ccb_mem_set_clock(rig, now_us);
        ccb_mem_set_adc(rig, 0, (uint16_t)next_random(&x));
        law_counts[0] += ccb_state(&rig->board) == CCB_STATE_RUNNING && ccb_law_mode(&rig->board);
        ccb_tick(&rig->board);
        if (rig->mem.tx_len > CCB_MEM_TX_BYTES / 2u) {
            drain_board_output(rig, out_d, out_bad_crc);
        }
    }
    drain_board_output(rig, out_d, out_bad_crc);
    ccb_law_counts(&rig->board, &late, &ahead);
    law_counts[1] += late;
    law_counts[2] += ahead;
}

int main(int argc, char **argv)
{
    size_t len = 0, chunk, pos, i;
    uint8_t *data;
    ccb_deframer d, out_d;
    uint32_t digest = 2166136261u, crc_fail = 0, out_bad_crc = 0, now_us = 0;
    uint32_t reasons[5] = {0, 0, 0, 0, 0}, law_counts[3] = {0, 0, 0};
    static ccb_mem_rig rig;
    ccb_board_info info;
    ccb_status st;
    uint8_t frame[CCB_MAX_WIRE], body[16];
    ccb_result r;

    if (argc != 3) {
        fprintf(stderr, "usage: %s STREAM_FILE CHUNK_BYTES\n", argv[0]);
        return 1;
    }
    data = read_file(argv[1], &len);
    chunk = (size_t)strtoul(argv[2], NULL, 10);
    if (data == NULL || chunk < 1u) {
        fprintf(stderr, "cannot read %s or bad chunk size\n", argv[1]);
        return 1;
    }

    /* 1. The deframer alone. */
    ccb_deframer_init(&d);
    for (i = 0; i < len; i++) {
        int n = ccb_deframe_byte(&d, data[i]);
        if (n > 0) {
            digest = ccb_mem_digest(digest, d.buf, (size_t)n);
            if (crc_bitwise(d.buf, (size_t)n - 2u) !=
                (uint16_t)(d.buf[n - 2] | (d.buf[n - 1] << 8))) {
                crc_fail++;
            }
        } else if (n == CCB_DEFRAME_BAD && d.last_error < 5u) {
            reasons[d.last_error]++;
        }
    }

    /* 2. A running board fed the same stream in chunks, one tick per chunk. */
    memset(&info, 0, sizeof(info));
    memcpy(info.identity, "fuzz-board", 10);
    info.adc_bits = 16;
    info.dac_bits = 16;
    info.n_inputs = 2;
    info.n_outputs = 2;
    info.adc_min_uV = -10000000;
    info.adc_max_uV = 10000000;
    info.dac_min_uV = -10000000;
    info.dac_max_uV = 10000000;
    info.max_rate_hz = 50000;
    info.watchdog_min_us = 100;
    info.watchdog_max_us = 60000000;
    if (ccb_mem_rig_init(&rig, &info) != CCB_OK) {
        fprintf(stderr, "ccb_init failed\n");
        return 1;
    }
    ccb_deframer_init(&out_d);
    /* CONFIGURE v1, 1000 Hz, 2 inputs, watchdog 20 ms, fault 32768 32768; then START. */
    memset(body, 0, sizeof(body));
    body[0] = 1;
    body[1] = 0xE8;
    body[2] = 0x03;
    body[5] = 2;
    body[6] = 0x20;
    body[7] = 0x4E;
    body[11] = 0x80;
    body[13] = 0x80;
    r = ccb_frame_encode(CCB_MSG_CONFIGURE, 1, body, 14, frame, sizeof(frame));
    ccb_feed(&rig.board, frame, r.len);
    r = ccb_frame_encode(CCB_MSG_START, 2, NULL, 0, frame, sizeof(frame));
    ccb_feed(&rig.board, frame, r.len);
    for (pos = 0; pos < len; pos += chunk) {
        size_t n = len - pos < chunk ? len - pos : chunk;
        ccb_feed(&rig.board, &data[pos], n);
        now_us += 1000u;
        ccb_mem_set_clock(&rig, now_us);
        ccb_tick(&rig.board);
        if (rig.mem.tx_len > CCB_MEM_TX_BYTES / 2u) {
            drain_board_output(&rig, &out_d, &out_bad_crc);
        }
    }
    drain_board_output(&rig, &out_d, &out_bad_crc);
    ccb_get_status(&rig.board, &st);
    run_law_board(&rig, &info, data, len, chunk, &out_d, &out_bad_crc, law_counts);

    printf("{\"bytes\": %lu, \"good\": %lu, \"bad\": %lu, \"err_cobs\": %lu, \"err_short\": %lu,"
           " \"err_long\": %lu, \"err_crc\": %lu, \"digest\": %lu, \"accepted_crc_fail\": %lu,"
           " \"board_state\": %u, \"board_bad_frames\": %lu, \"board_unknown\": %lu,"
           " \"board_rejected\": %lu, \"board_applied\": %lu, \"board_trips\": %lu,"
           " \"board_out_good\": %lu, \"board_out_bad\": %lu, \"board_out_bad_crc\": %lu,"
           " \"board_tx_dropped\": %lu, \"law_ticks\": %lu, \"laws_late\": %lu,"
           " \"laws_ahead\": %lu}\n",
           (unsigned long)len, (unsigned long)d.good, (unsigned long)d.bad,
           (unsigned long)reasons[1], (unsigned long)reasons[2], (unsigned long)reasons[3],
           (unsigned long)reasons[4], (unsigned long)digest, (unsigned long)crc_fail,
           (unsigned)st.state, (unsigned long)st.bad_frames, (unsigned long)st.unknown_messages,
           (unsigned long)st.rejected, (unsigned long)st.commands_applied,
           (unsigned long)st.watchdog_trips, (unsigned long)out_d.good, (unsigned long)out_d.bad,
           (unsigned long)out_bad_crc, (unsigned long)rig.mem.tx_dropped,
           (unsigned long)law_counts[0], (unsigned long)law_counts[1],
           (unsigned long)law_counts[2]);
    free(data);
    return (crc_fail != 0 || out_d.bad != 0 || out_bad_crc != 0) ? 2 : 0;
}
