/*
 * pty_board.c - host port of the ccb board core on a pseudo-terminal, with a
 * passive RC cell behind its converters.  For tests and demos on a PC.
 *
 * Opens a pseudo-terminal, prints the slave path as the first line on stdout,
 * then runs the board core on the wall clock (CLOCK_MONOTONIC) at the rate the
 * host configures, until SIGTERM/SIGINT, or until stdin reaches end of file when
 * stdin is a pipe or socket (so a parent that dies takes the board with it).
 *
 * The cell (one per input channel; input i reads cell i, output i drives cell i):
 *     C dV/dt = -g_L (V - E_L) + I          (pF, nS, mV, pA: nS*mV = pA, pA/pF = mV/ms)
 * integrated exactly for piecewise-constant I: every DAC write and ADC read first
 * advances V to "now" with V <- V_inf + (V - V_inf) exp(-dt/tau), tau = C/g_L,
 * V_inf = E_L + I/g_L.  Converters and amplifier follow PROTOCOL.md section 6:
 *     ADC volts = (V_mV - vm_offset_mV) / vm_mV_per_V,
 *     I_pA      = cmd_pA_per_V * DAC volts + cmd_offset_pA.
 *
 * In law mode (PROTOCOL.md §10) the core reads the ADC and writes the DAC in the same
 * tick: the read advances the cell to that instant, the write changes its current from
 * that instant, so the current the law gives at sample k drives the cell over
 * (t_k, t_k+1], the timing of the host's offline simulation and of the simulated rig.
 *
 * Build: cc -std=c99 -Wall -Wextra -Werror -pedantic -O2 -ffp-contract=off
 *            ccb_core.c ccb_law.c ports/pty_board.c -lm
 * Run `pty_board --help` for the options.  Missed sample ticks (the process was
 * not scheduled in time) are skipped, not caught up: the board clock in each
 * SAMPLE shows the gap.
 */
#define _XOPEN_SOURCE 600 /* posix_openpt, grantpt, unlockpt, ptsname, pselect */

#include <errno.h>
#include <fcntl.h>
#include <math.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/select.h>
#include <sys/stat.h>
#include <termios.h>
#include <time.h>
#include <unistd.h>

#include "../ccb.h"

typedef struct rig {
    ccb_board board;
    int master_fd;
    uint64_t t0_ns;
    /* amplifier scaling (PROTOCOL.md section 6) */
    double vm_mV_per_V, vm_offset_mV, cmd_pA_per_V, cmd_offset_pA;
    /* passive cell, one per input channel */
    double c_pF, g_nS, e_mV;
    double v_mV[CCB_MAX_CHANNELS];
    double i_pA[CCB_MAX_CHANNELS];
    uint64_t cell_ns;
    unsigned long tx_dropped;
} rig;

static volatile sig_atomic_t stop_requested = 0;

static void on_signal(int sig)
{
    (void)sig;
    stop_requested = 1;
}

static uint64_t now_ns(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (uint64_t)ts.tv_sec * 1000000000u + (uint64_t)ts.tv_nsec;
}

static void advance_cells(rig *r)
{
    uint64_t t = now_ns();
    double dt_ms = (double)(t - r->cell_ns) * 1e-6;
    double tau_ms = r->c_pF / r->g_nS; /* pF / nS = ms */
    double decay = exp(-dt_ms / tau_ms);
    unsigned i;
    for (i = 0; i < CCB_MAX_CHANNELS; i++) {
        double v_inf_mV = r->e_mV + r->i_pA[i] / r->g_nS;
        r->v_mV[i] = v_inf_mV + (r->v_mV[i] - v_inf_mV) * decay;
    }
    r->cell_ns = t;
}

static uint16_t port_read_adc(void *ctx, uint8_t channel)
{
    rig *r = (rig *)ctx;
    const ccb_board_info *info = &r->board.info;
    double full = (double)((1uL << info->adc_bits) - 1u);
    double v_out_uV, c;
    advance_cells(r);
    v_out_uV = (r->v_mV[channel] - r->vm_offset_mV) / r->vm_mV_per_V * 1e6;
    c = floor((v_out_uV - info->adc_min_uV) / ((double)info->adc_max_uV - info->adc_min_uV) *
                  full +
              0.5);
    if (c < 0.0) {
        c = 0.0;
    }
    if (c > full) {
        c = full;
    }
    return (uint16_t)c;
}

static void port_write_dac(void *ctx, uint8_t channel, uint16_t counts)
{
    rig *r = (rig *)ctx;
    const ccb_board_info *info = &r->board.info;
    double full = (double)((1uL << info->dac_bits) - 1u);
    double v_uV = info->dac_min_uV + counts * ((double)info->dac_max_uV - info->dac_min_uV) / full;
    advance_cells(r); /* the old current up to now */
    r->i_pA[channel] = r->cmd_pA_per_V * v_uV * 1e-6 + r->cmd_offset_pA;
}

static uint32_t port_micros(void *ctx)
{
    rig *r = (rig *)ctx;
    return (uint32_t)((now_ns() - r->t0_ns) / 1000u);
}

static void port_serial_write(void *ctx, const uint8_t *data, size_t len)
{
    rig *r = (rig *)ctx;
    while (len > 0) {
        ssize_t n = write(r->master_fd, data, len);
        if (n > 0) {
            data += n;
            len -= (size_t)n;
        } else if (n < 0 && errno == EINTR) {
            continue;
        } else { /* buffer full (nobody reading): drop, as a USB serial link would */
            r->tx_dropped += (unsigned long)len;
            return;
        }
    }
}

static void usage(const char *argv0)
{
    fprintf(stderr,
            "usage: %s [options]\n"
            "  --identity TEXT        board identity in HELLO (<= 16 ASCII chars) [cc-pty-board]\n"
            "  --inputs N --outputs N channels [1 1]\n"
            "  --adc-bits N --dac-bits N [16 16]\n"
            "  --adc-min-uV X --adc-max-uV X --dac-min-uV X --dac-max-uV X [-10 V .. +10 V]\n"
            "  --max-rate-hz N        [50000]\n"
            "  --watchdog-min-us N --watchdog-max-us N [100 60000000]\n"
            "  --vm-mV-per-V X        membrane potential per volt of the Vm output [100]\n"
            "  --vm-offset-mV X       [0]\n"
            "  --cmd-pA-per-V X       current per volt at the command input [400]\n"
            "  --cmd-offset-pA X      [0]\n"
            "  --c-pF X --g-nS X --e-mV X   passive cell [100 5 -70]\n"
            "Prints the pseudo-terminal's slave path, then serves until SIGTERM/SIGINT\n"
            "or until stdin (when a pipe or socket) reaches end of file.\n",
            argv0);
}

static int parse_num(const char *s, double lo, double hi, double *out)
{
    char *end = NULL;
    double v;
    errno = 0;
    v = strtod(s, &end);
    if (errno != 0 || end == s || *end != '\0' || !(v >= lo && v <= hi)) {
        return -1;
    }
    *out = v;
    return 0;
}

static int parse_int(const char *s, double lo, double hi, double *out)
{
    return (parse_num(s, lo, hi, out) == 0 && *out == floor(*out)) ? 0 : -1;
}

#define I32_MIN (-2147483648.0)
#define I32_MAX 2147483647.0
#define U32_MAX 4294967295.0

static int parse_args(int argc, char **argv, rig *r, ccb_board_info *info)
{
    int i;
    for (i = 1; i < argc; i++) {
        const char *opt = argv[i];
        const char *val = (i + 1 < argc) ? argv[i + 1] : NULL;
        double v = 0.0;
        int ok = 0;
        if (strcmp(opt, "--help") == 0 || strcmp(opt, "-h") == 0) {
            usage(argv[0]);
            exit(0);
        }
        if (val == NULL) {
            fprintf(stderr, "%s: option %s needs a value\n", argv[0], opt);
            return -1;
        }
        if (strcmp(opt, "--identity") == 0) {
            size_t n = strlen(val);
            if (n > CCB_IDENTITY_BYTES) {
                fprintf(stderr, "%s: --identity is longer than %u\n", argv[0],
                        (unsigned)CCB_IDENTITY_BYTES);
                return -1;
            }
            memset(info->identity, 0, sizeof(info->identity));
            memcpy(info->identity, val, n);
            ok = 1;
        } else if (strcmp(opt, "--inputs") == 0 && !parse_int(val, 1, CCB_MAX_CHANNELS, &v)) {
            info->n_inputs = (uint8_t)v;
            ok = 1;
        } else if (strcmp(opt, "--outputs") == 0 && !parse_int(val, 1, CCB_MAX_CHANNELS, &v)) {
            info->n_outputs = (uint8_t)v;
            ok = 1;
        } else if (strcmp(opt, "--adc-bits") == 0 && !parse_int(val, 1, 16, &v)) {
            info->adc_bits = (uint8_t)v;
            ok = 1;
        } else if (strcmp(opt, "--dac-bits") == 0 && !parse_int(val, 1, 16, &v)) {
            info->dac_bits = (uint8_t)v;
            ok = 1;
        } else if (strcmp(opt, "--adc-min-uV") == 0 && !parse_int(val, I32_MIN, I32_MAX, &v)) {
            info->adc_min_uV = (int32_t)v;
            ok = 1;
        } else if (strcmp(opt, "--adc-max-uV") == 0 && !parse_int(val, I32_MIN, I32_MAX, &v)) {
            info->adc_max_uV = (int32_t)v;
            ok = 1;
        } else if (strcmp(opt, "--dac-min-uV") == 0 && !parse_int(val, I32_MIN, I32_MAX, &v)) {
            info->dac_min_uV = (int32_t)v;
            ok = 1;
        } else if (strcmp(opt, "--dac-max-uV") == 0 && !parse_int(val, I32_MIN, I32_MAX, &v)) {
            info->dac_max_uV = (int32_t)v;
            ok = 1;
        } else if (strcmp(opt, "--max-rate-hz") == 0 && !parse_int(val, 1, 1e6, &v)) {
            info->max_rate_hz = (uint32_t)v;
            ok = 1;
        } else if (strcmp(opt, "--watchdog-min-us") == 0 && !parse_int(val, 1, U32_MAX, &v)) {
            info->watchdog_min_us = (uint32_t)v;
            ok = 1;
        } else if (strcmp(opt, "--watchdog-max-us") == 0 && !parse_int(val, 1, U32_MAX, &v)) {
            info->watchdog_max_us = (uint32_t)v;
            ok = 1;
        } else if (strcmp(opt, "--vm-mV-per-V") == 0 && !parse_num(val, 1e-9, 1e9, &v)) {
            r->vm_mV_per_V = v;
            ok = 1;
        } else if (strcmp(opt, "--vm-offset-mV") == 0 && !parse_num(val, -1e6, 1e6, &v)) {
            r->vm_offset_mV = v;
            ok = 1;
        } else if (strcmp(opt, "--cmd-pA-per-V") == 0 && !parse_num(val, 1e-9, 1e9, &v)) {
            r->cmd_pA_per_V = v;
            ok = 1;
        } else if (strcmp(opt, "--cmd-offset-pA") == 0 && !parse_num(val, -1e9, 1e9, &v)) {
            r->cmd_offset_pA = v;
            ok = 1;
        } else if (strcmp(opt, "--c-pF") == 0 && !parse_num(val, 1e-6, 1e9, &v)) {
            r->c_pF = v;
            ok = 1;
        } else if (strcmp(opt, "--g-nS") == 0 && !parse_num(val, 1e-9, 1e9, &v)) {
            r->g_nS = v;
            ok = 1;
        } else if (strcmp(opt, "--e-mV") == 0 && !parse_num(val, -1e4, 1e4, &v)) {
            r->e_mV = v;
            ok = 1;
        }
        if (!ok) {
            fprintf(stderr, "%s: bad option or value: %s %s (see --help)\n", argv[0], opt, val);
            return -1;
        }
        i++;
    }
    return 0;
}

static int open_pty(rig *r, int *slave_fd, const char **slave_path)
{
    struct termios tio;
    int flags;
    r->master_fd = posix_openpt(O_RDWR | O_NOCTTY);
    if (r->master_fd < 0 || grantpt(r->master_fd) != 0 || unlockpt(r->master_fd) != 0) {
        return -1;
    }
    *slave_path = ptsname(r->master_fd);
    if (*slave_path == NULL) {
        return -1;
    }
    /* Keep the slave open ourselves: the master then never sees a hang-up when a
     * host closes and reopens the port.  Raw mode (POSIX flags, as cfmakeraw). */
    *slave_fd = open(*slave_path, O_RDWR | O_NOCTTY);
    if (*slave_fd < 0 || tcgetattr(*slave_fd, &tio) != 0) {
        return -1;
    }
    tio.c_iflag &= ~(tcflag_t)(IGNBRK | BRKINT | PARMRK | ISTRIP | INLCR | IGNCR | ICRNL | IXON);
    tio.c_oflag &= ~(tcflag_t)OPOST;
    tio.c_lflag &= ~(tcflag_t)(ECHO | ECHONL | ICANON | ISIG | IEXTEN);
    tio.c_cflag &= ~(tcflag_t)(CSIZE | PARENB);
    tio.c_cflag |= CS8;
    tio.c_cc[VMIN] = 1;
    tio.c_cc[VTIME] = 0;
    if (tcsetattr(*slave_fd, TCSANOW, &tio) != 0) {
        return -1;
    }
    flags = fcntl(r->master_fd, F_GETFL);
    if (flags < 0 || fcntl(r->master_fd, F_SETFL, flags | O_NONBLOCK) != 0) {
        return -1;
    }
    return 0;
}

int main(int argc, char **argv)
{
    static rig r;
    ccb_board_info info;
    ccb_port port;
    struct sigaction sa;
    struct stat st;
    const char *slave_path = NULL;
    int slave_fd = -1, watch_stdin;
    uint64_t start_ns = 0, ticks = 0;
    unsigned i;

    memset(&info, 0, sizeof(info));
    memcpy(info.identity, "cc-pty-board", 12);
    info.adc_bits = 16;
    info.dac_bits = 16;
    info.n_inputs = 1;
    info.n_outputs = 1;
    info.adc_min_uV = -10000000; /* +-10 V: a common DAQ input range */
    info.adc_max_uV = 10000000;
    info.dac_min_uV = -10000000;
    info.dac_max_uV = 10000000;
    info.max_rate_hz = 50000;
    info.watchdog_min_us = 100;
    info.watchdog_max_us = 60000000;
    r.vm_mV_per_V = 100.0;  /* a "10 Vm" output: 10 mV per mV, i.e. 100 mV of Vm per volt */
    r.cmd_pA_per_V = 400.0; /* a typical current-clamp command sensitivity; set your own */
    r.c_pF = 100.0;         /* passive cell of the task: C = 100 pF, g_L = 5 nS, E_L = -70 mV */
    r.g_nS = 5.0;
    r.e_mV = -70.0;
    if (parse_args(argc, argv, &r, &info) != 0) {
        return 2;
    }
    r.t0_ns = now_ns();
    r.cell_ns = r.t0_ns;
    for (i = 0; i < CCB_MAX_CHANNELS; i++) {
        r.v_mV[i] = r.e_mV; /* at rest, no current until the first DAC write */
        r.i_pA[i] = 0.0;
    }
    port.ctx = &r;
    port.read_adc = port_read_adc;
    port.write_dac = port_write_dac;
    port.micros = port_micros;
    port.serial_write = port_serial_write;
    if (ccb_init(&r.board, &info, &port) != CCB_OK) {
        fprintf(stderr, "%s: the board description is inconsistent (see --help)\n", argv[0]);
        return 2;
    }
    if (open_pty(&r, &slave_fd, &slave_path) != 0) {
        perror("pty_board: pseudo-terminal");
        return 1;
    }

    memset(&sa, 0, sizeof(sa));
    sa.sa_handler = on_signal;
    sigemptyset(&sa.sa_mask);
    sigaction(SIGTERM, &sa, NULL);
    sigaction(SIGINT, &sa, NULL);
    sa.sa_handler = SIG_IGN;
    sigaction(SIGPIPE, &sa, NULL);
    watch_stdin = fstat(STDIN_FILENO, &st) == 0 && (S_ISFIFO(st.st_mode) || S_ISSOCK(st.st_mode));

    printf("%s\n", slave_path);
    fflush(stdout);

    while (!stop_requested) {
        fd_set rd;
        struct timespec timeout;
        uint64_t now = now_ns(), wait_ns = 50000000u; /* idle: look around every 50 ms */
        int running = ccb_state(&r.board) == CCB_STATE_RUNNING, maxfd = r.master_fd, n;
        uint32_t rate = ccb_rate_hz(&r.board);
        if (running) {
            uint64_t due;
            if (start_ns == 0) {
                start_ns = now; /* sample 0 right away, then one per period */
                ticks = 0;
            }
            due = start_ns + ticks * 1000000000u / rate;
            if (now >= due) {
                ccb_tick(&r.board);
                ticks++;
                due = start_ns + ticks * 1000000000u / rate;
                if (due <= now) { /* late by more than a period: skip, do not burst */
                    ticks = (now - start_ns) * rate / 1000000000u + 1u;
                    due = start_ns + ticks * 1000000000u / rate;
                }
            }
            wait_ns = due > now ? due - now : 0;
        } else {
            start_ns = 0;
        }
        FD_ZERO(&rd);
        FD_SET(r.master_fd, &rd);
        if (watch_stdin) {
            FD_SET(STDIN_FILENO, &rd);
            if (STDIN_FILENO > maxfd) {
                maxfd = STDIN_FILENO;
            }
        }
        timeout.tv_sec = (time_t)(wait_ns / 1000000000u);
        timeout.tv_nsec = (long)(wait_ns % 1000000000u);
        n = pselect(maxfd + 1, &rd, NULL, NULL, &timeout, NULL);
        if (n < 0) {
            if (errno == EINTR) {
                continue;
            }
            perror("pty_board: pselect");
            break;
        }
        if (n > 0 && FD_ISSET(r.master_fd, &rd)) {
            uint8_t buf[4096];
            ssize_t got = read(r.master_fd, buf, sizeof(buf));
            if (got > 0) {
                ccb_feed(&r.board, buf, (size_t)got);
            } else if (got < 0 && errno != EAGAIN && errno != EINTR) {
                perror("pty_board: read");
                break;
            }
        }
        if (n > 0 && watch_stdin && FD_ISSET(STDIN_FILENO, &rd)) {
            char sink[256];
            if (read(STDIN_FILENO, sink, sizeof(sink)) <= 0) {
                break; /* parent closed our stdin */
            }
        }
    }
    if (r.tx_dropped > 0) {
        fprintf(stderr, "pty_board: %lu bytes dropped (nobody was reading)\n", r.tx_dropped);
    }
    close(slave_fd);
    close(r.master_fd);
    return 0;
}
