/*
 * memory_port.h - an in-memory host port of the ccb board core, for tests.
 *
 * The ADC returns values the test sets, DAC writes are recorded, the clock is
 * whatever the test sets, and serial output collects in a buffer.  A "rig" is a
 * board plus its memory port in one object so that ctypes can allocate it as a
 * plain byte buffer of ccb_mem_rig_size() bytes.
 *
 * Also: ccb_mem_deframe_stream(), the C deframer run over a whole byte stream
 * (used by the shared-vector, property and fuzz tests).
 */
#ifndef CCB_MEMORY_PORT_H
#define CCB_MEMORY_PORT_H

#include "../ccb.h"

#ifdef __cplusplus
extern "C" {
#endif

#define CCB_MEM_TX_BYTES 65536u

typedef struct ccb_mem_port {
    uint16_t adc[CCB_MAX_CHANNELS];
    uint16_t dac[CCB_MAX_CHANNELS];
    uint32_t dac_writes;
    uint32_t now_us;
    size_t tx_len;
    uint32_t tx_dropped; /* bytes that did not fit in tx */
    uint8_t tx[CCB_MEM_TX_BYTES];
} ccb_mem_port;

typedef struct ccb_mem_rig {
    ccb_board board;
    ccb_mem_port mem;
} ccb_mem_rig;

size_t ccb_mem_rig_size(void);
uint8_t ccb_mem_rig_init(ccb_mem_rig *r, const ccb_board_info *info);
ccb_board *ccb_mem_rig_board(ccb_mem_rig *r);
void ccb_mem_set_adc(ccb_mem_rig *r, uint8_t channel, uint16_t counts);
uint16_t ccb_mem_dac(const ccb_mem_rig *r, uint8_t channel);
uint32_t ccb_mem_dac_writes(const ccb_mem_rig *r);
void ccb_mem_set_clock(ccb_mem_rig *r, uint32_t now_us);
/* Copy up to cap bytes of collected serial output to out, forget them, return how many. */
size_t ccb_mem_take_tx(ccb_mem_rig *r, uint8_t *out, size_t cap);

/* Run a fresh deframer over data[0:len], fed `chunk` bytes at a time (chunk >= 1).
 * Accepted payloads go back to back into out (cap bytes), their lengths into
 * lens (max_frames entries).  counts[0] = good frames, counts[1] = bad frames,
 * counts[1 + e] = bad frames with CCB_FRAME_ERR e (e = 1..4), counts[7] = FNV-1a
 * digest of every accepted payload.  Returns the number of payloads stored. */
size_t ccb_mem_deframe_stream(const uint8_t *data, size_t len, size_t chunk, uint8_t *out,
                              size_t cap, uint16_t *lens, size_t max_frames, uint32_t *counts);

/* FNV-1a 32-bit step over one payload: its length byte, then its bytes. */
uint32_t ccb_mem_digest(uint32_t h, const uint8_t *payload, size_t len);

#ifdef __cplusplus
}
#endif

#endif /* CCB_MEMORY_PORT_H */
