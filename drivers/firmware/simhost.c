/*
 * simhost: run the reference firmware in simavr and hand its UART bytes,
 * unaltered, to a file descriptor (a pipe or a pseudo-terminal master).
 *
 *   simhost FIRMWARE.elf [--seconds S] [--fd N] [--sine-hz F]
 *                        [--sine-mv A] [--offset-mv O] [--pace-ppm P]
 *
 * ADC0 sees offset + A sin(2 pi F t) millivolts, t being simulated time at the
 * start of each conversion.  Supply and reference are 5000 mV.  The bytes are
 * written with blocking writes, so a slow reader slows the simulation instead
 * of losing data.  libsimavr prints its load message on stdout, so data goes to
 * --fd (default 3), never stdout.  A summary line goes to stderr at the end.
 *
 * --pace-ppm P runs the simulation in real time with the board's crystal P ppm
 * fast (P may be 0 or negative): simulated second s is held back until host
 * monotonic time t0 + s / (1 + P 1e-6), checked every simulated millisecond;
 * when a full pipe held the simulation up, the schedule moves on rather than
 * catching up (a board never sends faster than its crystal).
 * Without it the simulation runs as fast as it can.
 *
 * Why not the simavr command-line runner: its UART console turns the byte
 * stream into text lines (the UART "stdio" flag), which mangles binary frames.
 * Why the sleep callback is replaced: the default one sleeps in real time while
 * the firmware idles; skipping it lets the simulation run as fast as it can.
 */
#include <errno.h>
#include <math.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include <avr_adc.h>
#include <avr_uart.h>
#include <sim_avr.h>
#include <sim_elf.h>
#include <sim_irq.h>

#define F_CPU 16000000UL

static int out_fd = 3;
static unsigned char out_buf[4096];
static size_t out_len;
static unsigned long long out_total;
static int out_broken;

static double sine_hz = 123.0, sine_mv = 1000.0, offset_mv = 2500.0;
static int pace = 0;
static double pace_ppm = 0.0;
static avr_irq_t *adc0_irq;

static void flush_out(void)
{
    size_t done = 0;
    while (done < out_len && !out_broken) {
        ssize_t n = write(out_fd, out_buf + done, out_len - done);
        if (n < 0) {
            if (errno == EINTR)
                continue;
            out_broken = 1; /* the reader went away: keep quiet, stop at the end */
            break;
        }
        done += (size_t)n;
    }
    out_len = 0;
}

static void uart_out(struct avr_irq_t *irq, uint32_t value, void *param)
{
    (void)irq;
    (void)param;
    out_buf[out_len++] = (unsigned char)value;
    out_total++;
    if (out_len == sizeof out_buf)
        flush_out();
}

static void adc_trigger(struct avr_irq_t *irq, uint32_t value, void *param)
{
    (void)irq;
    (void)value;
    avr_t *avr = param;
    double t = (double)avr->cycle / (double)avr->frequency;
    double mv = offset_mv + sine_mv * sin(2.0 * M_PI * sine_hz * t);
    if (mv < 0)
        mv = 0;
    avr_raise_irq(adc0_irq, (uint32_t)lround(mv));
}

static void no_sleep(avr_t *avr, avr_cycle_count_t how_long)
{
    (void)avr;
    (void)how_long;
}

static double now(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return ts.tv_sec + ts.tv_nsec * 1e-9;
}

static void usage(void)
{
    fprintf(stderr, "usage: simhost FIRMWARE.elf [--seconds S] [--fd N] [--sine-hz F] "
                    "[--sine-mv A] [--offset-mv O] [--pace-ppm P]\n");
    exit(2);
}

int main(int argc, char **argv)
{
    const char *path = NULL;
    double seconds = 10.0;
    for (int i = 1; i < argc; i++) {
        const char *a = argv[i];
        if (a[0] != '-') {
            path = a;
            continue;
        }
        if (i + 1 >= argc)
            usage();
        double v = atof(argv[++i]);
        if (!strcmp(a, "--seconds"))
            seconds = v;
        else if (!strcmp(a, "--fd"))
            out_fd = (int)v;
        else if (!strcmp(a, "--sine-hz"))
            sine_hz = v;
        else if (!strcmp(a, "--sine-mv"))
            sine_mv = v;
        else if (!strcmp(a, "--offset-mv"))
            offset_mv = v;
        else if (!strcmp(a, "--pace-ppm")) {
            pace = 1;
            pace_ppm = v;
        }
        else
            usage();
    }
    if (!path)
        usage();
    signal(SIGPIPE, SIG_IGN);

    elf_firmware_t fw;
    memset(&fw, 0, sizeof fw);
    if (elf_read_firmware(path, &fw) != 0) {
        fprintf(stderr, "simhost: cannot read %s\n", path);
        return 1;
    }
    avr_t *avr = avr_make_mcu_by_name("atmega328p");
    if (!avr) {
        fprintf(stderr, "simhost: simavr has no atmega328p core\n");
        return 1;
    }
    avr_init(avr);
    avr_load_firmware(avr, &fw);
    avr->frequency = F_CPU;
    avr->vcc = avr->avcc = avr->aref = 5000; /* millivolts; the ADC reads 0 without them */
    avr->sleep = no_sleep;

    uint32_t flags = 0;
    avr_ioctl(avr, AVR_IOCTL_UART_GET_FLAGS('0'), &flags);
    flags &= ~(AVR_UART_FLAG_STDIO | AVR_UART_FLAG_POLL_SLEEP);
    avr_ioctl(avr, AVR_IOCTL_UART_SET_FLAGS('0'), &flags);
    avr_irq_register_notify(avr_io_getirq(avr, AVR_IOCTL_UART_GETIRQ('0'), UART_IRQ_OUTPUT),
                            uart_out, NULL);
    adc0_irq = avr_io_getirq(avr, AVR_IOCTL_ADC_GETIRQ, ADC_IRQ_ADC0);
    avr_irq_register_notify(avr_io_getirq(avr, AVR_IOCTL_ADC_GETIRQ, ADC_IRQ_OUT_TRIGGER),
                            adc_trigger, avr);

    avr_cycle_count_t end = (avr_cycle_count_t)(seconds * F_CPU);
    avr_cycle_count_t next_check = F_CPU / 1000;
    double t0 = now();
    int state = cpu_Running;
    while (avr->cycle < end && !out_broken) {
        state = avr_run(avr);
        if (state == cpu_Done || state == cpu_Crashed)
            break;
        if (pace && avr->cycle >= next_check) {
            next_check = avr->cycle + F_CPU / 1000;
            flush_out(); /* bytes leave when the board would have sent them */
            double due = t0 + ((double)avr->cycle / F_CPU) / (1.0 + pace_ppm * 1e-6);
            double wait = due - now();
            if (wait < -0.05)
                t0 -= wait; /* held up (a full pipe): a board never sends faster than its clock */
            else if (wait > 0) {
                struct timespec ts = {(time_t)wait, (long)((wait - (double)(time_t)wait) * 1e9)};
                nanosleep(&ts, NULL);
            }
        }
    }
    flush_out();
    double wall = now() - t0;
    double simulated = (double)avr->cycle / F_CPU;
    fprintf(stderr, "simhost: %.3f s simulated in %.3f s wall (%.1fx real time), %llu bytes%s\n",
            simulated, wall, wall > 0 ? simulated / wall : 0.0, out_total,
            state == cpu_Crashed ? ", firmware crashed" : "");
    return state == cpu_Crashed ? 1 : 0;
}
