/*
 * arduino_example.ino - example port of the ccb board core to an Arduino-compatible
 * board.  DOCUMENTATION: it shows where each piece goes and is not built or tested
 * here.  Copy ccb.h, ccb_core.c, ccb_law.h and ccb_law.c next to this sketch (the
 * Arduino IDE compiles .c files as C; the headers have extern "C" guards).
 *
 * Law mode (PROTOCOL.md §10): the core holds CCB_LAW_QUEUE laws (20 bytes each) and a
 * block table of CCB_BLOCK_POINTS floats: 24 KiB with the defaults.  A SAMD21 (32 KiB
 * RAM) needs them smaller: add build flags -DCCB_LAW_QUEUE=256 (5 KiB, 25 ms at
 * 10 kHz: keep the host's lead_ms below it) and, with an FPU that fuses multiply-adds
 * (Cortex-M4F and up), -ffp-contract=off, or the board's currents will differ from
 * the host's in the last bit.  -DCCB_LAW_QUEUE=0 leaves law mode out (current mode).
 *
 * Assumed hardware: a 32-bit board with a 12-bit ADC and a 12-bit DAC on chip and
 * native USB serial (a SAMD21 or SAM3X class board, for example).  Such on-chip
 * converters are unipolar (0 .. 3.3 V or less), while an amplifier's Vm output and
 * command input are bipolar (typically +-10 V): an analogue front end (divider and
 * level shifter in, level shifter and gain out) is needed, and the ranges below
 * must be those measured AT THE BOARD'S CONNECTORS, after that front end.
 * The numbers below are placeholders: measure yours.
 */
#include <Arduino.h>

#include "ccb.h"

static const uint8_t kAdcPins[] = {A1};  /* input channel 0: amplifier Vm output */
static const uint8_t kDacPins[] = {A0};  /* output channel 0: amplifier command input */

static ccb_board board;
static uint32_t next_tick_us;
static bool was_running = false;

static uint16_t port_read_adc(void *ctx, uint8_t channel)
{
    (void)ctx;
    return (uint16_t)analogRead(kAdcPins[channel]);
}

static void port_write_dac(void *ctx, uint8_t channel, uint16_t counts)
{
    (void)ctx;
    analogWrite(kDacPins[channel], counts);
}

static uint32_t port_micros(void *ctx)
{
    (void)ctx;
    return micros(); /* wraps every 2^32 us, as the protocol expects */
}

static void port_serial_write(void *ctx, const uint8_t *data, size_t len)
{
    (void)ctx;
    /* Never block the sample loop: drop what does not fit (the host sees the gap
     * in the board's frame numbers).  availableForWrite() is 0 on some cores'
     * native USB; then just write. */
    int room = Serial.availableForWrite();
    if (room > 0 && (size_t)room < len) {
        return;
    }
    Serial.write(data, len);
}

void setup()
{
    ccb_board_info info;
    ccb_port port;

    Serial.begin(2000000); /* the baud rate is ignored by native USB serial */
    analogReadResolution(12);
    analogWriteResolution(12);

    memset(&info, 0, sizeof(info));
    memcpy(info.identity, "example-12bit", 13);
    info.adc_bits = 12;
    info.dac_bits = 12;
    info.n_inputs = 1;
    info.n_outputs = 1;
    info.adc_min_uV = -10000000; /* placeholder: +-10 V after the input front end */
    info.adc_max_uV = 10000000;
    info.dac_min_uV = -10000000; /* placeholder: +-10 V after the output front end */
    info.dac_max_uV = 10000000;
    info.max_rate_hz = 10000;     /* what this loop can sustain: measure it */
    info.watchdog_min_us = 1000;
    info.watchdog_max_us = 10000000;

    port.ctx = NULL;
    port.read_adc = port_read_adc;
    port.write_dac = port_write_dac;
    port.micros = port_micros;
    port.serial_write = port_serial_write;
    ccb_init(&board, &info, &port);

    /* Until the host configures a fault value, output mid-scale, which the front
     * end should make 0 V, i.e. no current. */
    analogWrite(kDacPins[0], 2048);
}

void loop()
{
    /* 1. Everything that arrived on the serial line goes to the core. */
    uint8_t buf[64];
    int n = Serial.available();
    while (n > 0) {
        int got = Serial.readBytes(buf, n < (int)sizeof(buf) ? n : (int)sizeof(buf));
        if (got <= 0) {
            break;
        }
        ccb_feed(&board, buf, (size_t)got);
        n -= got;
    }

    /* 2. One tick per sample period while running.  The next tick is scheduled
     * from the previous one, not from "now", so the rate does not drift; if the
     * loop fell behind by more than a period, skip ahead instead of bursting. */
    if (ccb_state(&board) == CCB_STATE_RUNNING) {
        uint32_t period_us = 1000000uL / ccb_rate_hz(&board);
        uint32_t now = micros();
        if (!was_running) {
            next_tick_us = now;
            was_running = true;
        }
        if ((int32_t)(now - next_tick_us) >= 0) {
            ccb_tick(&board);
            next_tick_us += period_us;
            if ((int32_t)(now - next_tick_us) >= 0) {
                next_tick_us = now + period_us;
            }
        }
    } else {
        was_running = false;
    }
}
