/* rig_port.c - the board core as the simulated rig runs it; see rig_port.h. */
#include "rig_port.h"

size_t ccb_rig_size(void)
{
    return ccb_mem_rig_size();
}

uint8_t ccb_rig_init(void *rig, const ccb_board_info *info)
{
    return ccb_mem_rig_init((ccb_mem_rig *)rig, info);
}

void ccb_rig_feed(void *rig, const uint8_t *data, size_t len, uint32_t now_us)
{
    ccb_mem_rig *r = (ccb_mem_rig *)rig;
    ccb_mem_set_clock(r, now_us);
    ccb_feed(&r->board, data, len);
}

void ccb_rig_watchdog(void *rig, uint32_t now_us)
{
    ccb_mem_rig *r = (ccb_mem_rig *)rig;
    ccb_mem_set_clock(r, now_us);
    ccb_check_watchdog(&r->board);
}

void ccb_rig_tick(void *rig, uint16_t adc, uint32_t now_us)
{
    ccb_mem_rig *r = (ccb_mem_rig *)rig;
    ccb_mem_set_clock(r, now_us);
    ccb_mem_set_adc(r, 0u, adc);
    ccb_tick(&r->board);
}

size_t ccb_rig_take_tx(void *rig, uint8_t *out, size_t cap)
{
    return ccb_mem_take_tx((ccb_mem_rig *)rig, out, cap);
}

void ccb_rig_peek(const void *rig, int64_t *out)
{
    const ccb_mem_rig *r = (const ccb_mem_rig *)rig;
    const ccb_board *b = &r->board;
    out[CCB_RIG_STATE] = b->state;
    out[CCB_RIG_COUNTER] = b->counter;
    out[CCB_RIG_RATE_HZ] = b->rate_hz;
    out[CCB_RIG_WATCHDOG_US] = b->watchdog_us;
    out[CCB_RIG_FAULT_COUNTS] = b->fault_counts[0];
    out[CCB_RIG_HAVE_CMD] = b->have_command;
    out[CCB_RIG_TRIPPED] = b->tripped;
    out[CCB_RIG_CMD_SEQ] = b->cmd_seq;
    out[CCB_RIG_CMD_ANSWERS] = b->cmd_answers;
    out[CCB_RIG_LAST_RX_US] = b->last_rx_us;
    out[CCB_RIG_DAC] = r->mem.dac[0];
    out[CCB_RIG_LAW_MODE] = ccb_law_mode(b);
    out[CCB_RIG_BAD_FRAMES] = b->stats.bad_frames;
    out[CCB_RIG_UNKNOWN] = b->stats.unknown_messages;
    out[CCB_RIG_APPLIED] = b->stats.commands_applied;
    out[CCB_RIG_TRIPS] = b->stats.watchdog_trips;
    out[CCB_RIG_TX_LOST] = r->mem.tx_dropped;
}

void ccb_rig_status(const void *rig, ccb_status *out)
{
    ccb_get_status(&((const ccb_mem_rig *)rig)->board, out);
}
