/* memory_port.c - in-memory host port of the ccb board core; see memory_port.h. */
#include "memory_port.h"

#include <string.h>

static uint16_t mem_read_adc(void *ctx, uint8_t channel)
{
    const ccb_mem_port *m = (const ccb_mem_port *)ctx;
    return channel < CCB_MAX_CHANNELS ? m->adc[channel] : 0u;
}

static void mem_write_dac(void *ctx, uint8_t channel, uint16_t counts)
{
    ccb_mem_port *m = (ccb_mem_port *)ctx;
    if (channel < CCB_MAX_CHANNELS) {
        m->dac[channel] = counts;
    }
    m->dac_writes++;
}

static uint32_t mem_micros(void *ctx)
{
    return ((const ccb_mem_port *)ctx)->now_us;
}

static void mem_serial_write(void *ctx, const uint8_t *data, size_t len)
{
    ccb_mem_port *m = (ccb_mem_port *)ctx;
    size_t room = CCB_MEM_TX_BYTES - m->tx_len;
    size_t n = len < room ? len : room;
    memcpy(&m->tx[m->tx_len], data, n);
    m->tx_len += n;
    m->tx_dropped += (uint32_t)(len - n);
}

size_t ccb_mem_rig_size(void)
{
    return sizeof(ccb_mem_rig);
}

uint8_t ccb_mem_rig_init(ccb_mem_rig *r, const ccb_board_info *info)
{
    ccb_port port;
    memset(r, 0, sizeof(*r));
    port.ctx = &r->mem;
    port.read_adc = mem_read_adc;
    port.write_dac = mem_write_dac;
    port.micros = mem_micros;
    port.serial_write = mem_serial_write;
    return ccb_init(&r->board, info, &port);
}

ccb_board *ccb_mem_rig_board(ccb_mem_rig *r)
{
    return &r->board;
}

void ccb_mem_set_adc(ccb_mem_rig *r, uint8_t channel, uint16_t counts)
{
    if (channel < CCB_MAX_CHANNELS) {
        r->mem.adc[channel] = counts;
    }
}

uint16_t ccb_mem_dac(const ccb_mem_rig *r, uint8_t channel)
{
    return channel < CCB_MAX_CHANNELS ? r->mem.dac[channel] : 0u;
}

uint32_t ccb_mem_dac_writes(const ccb_mem_rig *r)
{
    return r->mem.dac_writes;
}

void ccb_mem_set_clock(ccb_mem_rig *r, uint32_t now_us)
{
    r->mem.now_us = now_us;
}

size_t ccb_mem_take_tx(ccb_mem_rig *r, uint8_t *out, size_t cap)
{
    size_t n = r->mem.tx_len < cap ? r->mem.tx_len : cap;
    memcpy(out, r->mem.tx, n);
    memmove(r->mem.tx, &r->mem.tx[n], r->mem.tx_len - n);
    r->mem.tx_len -= n;
    return n;
}

uint32_t ccb_mem_digest(uint32_t h, const uint8_t *payload, size_t len)
{
    /* FNV-1a, 32-bit: offset basis 2166136261, prime 16777619 (Fowler, Noll, Vo). */
    size_t i;
    h = (h ^ (uint32_t)(len & 0xFFu)) * 16777619u;
    for (i = 0; i < len; i++) {
        h = (h ^ payload[i]) * 16777619u;
    }
    return h;
}

size_t ccb_mem_deframe_stream(const uint8_t *data, size_t len, size_t chunk, uint8_t *out,
                              size_t cap, uint16_t *lens, size_t max_frames, uint32_t *counts)
{
    ccb_deframer d;
    size_t pos = 0, stored = 0, used = 0, i;
    uint32_t h = 2166136261u;
    memset(counts, 0, 8u * sizeof(uint32_t));
    ccb_deframer_init(&d);
    if (chunk < 1u) {
        chunk = 1u;
    }
    while (pos < len) {
        size_t end = (len - pos > chunk) ? pos + chunk : len;
        for (i = pos; i < end; i++) {
            int n = ccb_deframe_byte(&d, data[i]);
            if (n > 0) {
                h = ccb_mem_digest(h, d.buf, (size_t)n);
                if (stored < max_frames && used + (size_t)n <= cap) {
                    memcpy(&out[used], d.buf, (size_t)n);
                    lens[stored++] = (uint16_t)n;
                    used += (size_t)n;
                }
            } else if (n == CCB_DEFRAME_BAD && d.last_error >= 1u && d.last_error <= CCB_FRAME_ERR_CRC) {
                counts[1u + d.last_error]++;
            }
        }
        pos = end;
    }
    counts[0] = d.good;
    counts[1] = d.bad;
    counts[7] = h;
    return stored;
}
