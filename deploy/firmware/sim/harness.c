/*
 * harness.c: runs Plenum's reference firmware in simavr (libsimavr) in
 * emulated time, with known voltages on the analog pins, a known pulse
 * train on ICP1 (PB0) and the UART bridged to a pseudo-terminal that
 * Plenum's serial driver opens. Used by drivers/serial's
 * TestFirmwareEmulated and BenchmarkFirmwareRates.
 *
 *   harness -f plenum-mcu.elf [-m mv0,mv1,...] [-s rpm:ms,rpm:ms,...] [-p pulses/rev]
 *           [-g every] [-t total_ms] [-n] [-y name=addr,...]
 *
 *   -m  millivolts on ADC0, ADC1, ... (AVcc = AREF = 5000 mV)
 *   -s  engine speed schedule: rpm for ms, in order; 0 rpm sends no pulses
 *   -p  pulses per revolution of the train (as the firmware's config)
 *   -g  a 20 us spike 15% into every g-th period (for the glitch filter),
 *       none in the first two periods after a stop
 *   -t  emulated milliseconds to run
 *   -n  no pseudo-terminal: count the UART's lines and drop them
 *   -o  no pseudo-terminal: write the UART's bytes to this file
 *   -y  firmware variables (uint16/uint32 in SRAM, from avr-nm) to report
 *   -R  pace emulated time to the wall clock (to watch it in plenum run);
 *       without it the harness runs as fast as it can
 *
 * Lines on stdout that begin "harness:" are the harness's own; libsimavr
 * may print others. With a pseudo-terminal it prints "harness: pty PATH",
 * waits for a line on stdin before it starts, prints "harness: done ..."
 * with its counts and exits at end of stdin, so that the reader can
 * drain the terminal first.
 */
#define _DEFAULT_SOURCE
#define _XOPEN_SOURCE 600
#include <errno.h>
#include <fcntl.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <termios.h>
#include <time.h>
#include <unistd.h>

#include <avr_adc.h>
#include <avr_ioport.h>
#include <avr_uart.h>
#include <sim_avr.h>
#include <sim_elf.h>

#define HZ 16000000ULL
#define MAX_SEG 64
#define MAX_SYM 16

static struct {
  unsigned long rpm, ms;
} seg[MAX_SEG];
static int nseg;
static unsigned long pulses_per_rev = 1, glitch_every;
static unsigned long long pulses, glitches;
static unsigned long run_pulses; /* pulses since the engine last stood still */

static int master = -1;
static unsigned char out[4096];
static size_t outn;
static unsigned long long uart_bytes, uart_lines;

static void flush_out(void) {
  size_t off = 0;
  while (master >= 0 && off < outn) {
    ssize_t w = write(master, out + off, outn - off);
    if (w < 0) {
      if (errno == EINTR || errno == EAGAIN) {
        continue;
      }
      perror("harness: write pty");
      exit(1);
    }
    off += (size_t)w;
  }
  outn = 0;
}

static void uart_out(struct avr_irq_t *irq, uint32_t value, void *param) {
  (void)irq;
  (void)param;
  uart_bytes++;
  if (value == '\n') {
    uart_lines++;
  }
  if (master < 0) {
    return;
  }
  out[outn++] = (unsigned char)value;
  if (outn == sizeof out || value == '\n') {
    flush_out();
  }
}

/* rpm_at returns the scheduled engine speed at emulated cycle c. */
static unsigned long rpm_at(avr_cycle_count_t c) {
  unsigned long long t = 0;
  int i;
  for (i = 0; i < nseg; i++) {
    t += (unsigned long long)seg[i].ms * (HZ / 1000);
    if (c < t) {
      return seg[i].rpm;
    }
  }
  return 0;
}

static avr_irq_t *icp_pin;

/* The pulse train: a rising edge, 100 us high, then low until the next
 * period, whose length follows the schedule at the time of the edge. */
static avr_cycle_count_t pulse_edge(struct avr_t *avr, avr_cycle_count_t when, void *param);

static avr_cycle_count_t pulse_fall(struct avr_t *avr, avr_cycle_count_t when, void *param) {
  (void)avr;
  (void)when;
  (void)param;
  avr_raise_irq(icp_pin, 0);
  return 0;
}

static avr_cycle_count_t spike_rise(struct avr_t *avr, avr_cycle_count_t when, void *param);

static avr_cycle_count_t pulse_edge(struct avr_t *avr, avr_cycle_count_t when, void *param) {
  unsigned long rpm = rpm_at(when);
  avr_cycle_count_t period;
  (void)param;
  if (rpm == 0) {
    run_pulses = 0;
    return when + HZ / 1000; /* look again in a millisecond */
  }
  period = (avr_cycle_count_t)(60ULL * HZ / ((unsigned long long)rpm * pulses_per_rev));
  avr_raise_irq(icp_pin, 1);
  pulses++;
  run_pulses++;
  /* No spike before the firmware has a period to judge it by. */
  if (glitch_every != 0 && pulses % glitch_every == 0 && run_pulses > 2) {
    avr_cycle_timer_register(avr, (avr_cycle_count_t)(period * 15 / 100), spike_rise, NULL);
  }
  avr_cycle_timer_register(avr, HZ / 10000, pulse_fall, NULL); /* 100 us high */
  return when + period;
}

static avr_cycle_count_t spike_fall(struct avr_t *avr, avr_cycle_count_t when, void *param) {
  (void)avr;
  (void)when;
  (void)param;
  avr_raise_irq(icp_pin, 0);
  return 0;
}

static avr_cycle_count_t spike_rise(struct avr_t *avr, avr_cycle_count_t when, void *param) {
  (void)when;
  (void)param;
  avr_raise_irq(icp_pin, 1);
  glitches++;
  avr_cycle_timer_register(avr, HZ / 50000, spike_fall, NULL); /* 20 us */
  return 0;
}

/* The harness runs in emulated time: sleeping costs no wall time.
 * libsimavr calls this when the core sleeps, just before it moves the
 * cycle counter on by how_long + 1: the cycles spent asleep. */
static avr_cycle_count_t asleep;
static void no_sleep(avr_t *avr, avr_cycle_count_t how_long) {
  (void)avr;
  asleep += how_long + 1;
}

static int open_pty(char *path, size_t n) {
  struct termios tio;
  int slave;
  int m = posix_openpt(O_RDWR | O_NOCTTY);
  if (m < 0 || grantpt(m) != 0 || unlockpt(m) != 0 || ptsname(m) == NULL) {
    perror("harness: pseudo-terminal");
    exit(1);
  }
  snprintf(path, n, "%s", ptsname(m));
  /* Keep the slave open in raw mode: the terminal keeps its settings and
   * buffers while the reader opens and closes it. */
  slave = open(path, O_RDWR | O_NOCTTY);
  if (slave < 0 || tcgetattr(slave, &tio) != 0) {
    perror("harness: slave");
    exit(1);
  }
  cfmakeraw(&tio);
  tcsetattr(slave, TCSANOW, &tio);
  return m;
}

int main(int argc, char **argv) {
  const char *elf = NULL, *syms = NULL;
  unsigned long mv[8] = {0};
  unsigned long total_ms = 10000;
  int nmv = 0, use_pty = 1, realtime = 0, opt, i;
  struct timespec wall0;
  avr_cycle_count_t next_pace = 0;
  elf_firmware_t fw;
  avr_t *avr;
  avr_cycle_count_t end;
  char path[256];

  while ((opt = getopt(argc, argv, "f:m:s:p:g:t:no:y:R")) != -1) {
    char *p;
    switch (opt) {
    case 'f':
      elf = optarg;
      break;
    case 'm':
      for (p = optarg; *p && nmv < 8; nmv++) {
        mv[nmv] = strtoul(p, &p, 10);
        if (*p == ',') {
          p++;
        }
      }
      break;
    case 's':
      for (p = optarg; *p && nseg < MAX_SEG; nseg++) {
        seg[nseg].rpm = strtoul(p, &p, 10);
        if (*p != ':') {
          fprintf(stderr, "harness: -s wants rpm:ms,...\n");
          return 2;
        }
        seg[nseg].ms = strtoul(p + 1, &p, 10);
        if (*p == ',') {
          p++;
        }
      }
      break;
    case 'p':
      pulses_per_rev = strtoul(optarg, NULL, 10);
      break;
    case 'g':
      glitch_every = strtoul(optarg, NULL, 10);
      break;
    case 't':
      total_ms = strtoul(optarg, NULL, 10);
      break;
    case 'n':
      use_pty = 0;
      break;
    case 'o':
      use_pty = 0;
      master = open(optarg, O_WRONLY | O_CREAT | O_TRUNC, 0644);
      if (master < 0) {
        perror(optarg);
        return 1;
      }
      break;
    case 'y':
      syms = optarg;
      break;
    case 'R':
      realtime = 1;
      break;
    default:
      return 2;
    }
  }
  if (elf == NULL || pulses_per_rev == 0) {
    fprintf(stderr, "usage: harness -f firmware.elf [-m mv,...] [-s rpm:ms,...] [-p ppr] [-g n] [-t ms] [-n | -o file] [-y name=addr,...] [-R]\n");
    return 2;
  }
  setvbuf(stdout, NULL, _IOLBF, 0);

  memset(&fw, 0, sizeof fw);
  if (elf_read_firmware(elf, &fw) != 0) {
    fprintf(stderr, "harness: cannot read %s\n", elf);
    return 1;
  }
  avr = avr_make_mcu_by_name("atmega328p");
  if (avr == NULL) {
    fprintf(stderr, "harness: libsimavr has no atmega328p\n");
    return 1;
  }
  avr_init(avr);
  avr->log = LOG_ERROR;
  fw.frequency = (uint32_t)HZ;
  fw.vcc = fw.avcc = fw.aref = 5000;
  avr_load_firmware(avr, &fw);
  avr->frequency = (uint32_t)HZ;
  avr->vcc = avr->avcc = avr->aref = 5000;
  avr->sleep = no_sleep;

  {
    uint32_t flags = 0;
    avr_ioctl(avr, AVR_IOCTL_UART_GET_FLAGS('0'), &flags);
    flags &= ~(uint32_t)(AVR_UART_FLAG_STDIO | AVR_UART_FLAG_POLL_SLEEP);
    avr_ioctl(avr, AVR_IOCTL_UART_SET_FLAGS('0'), &flags);
  }
  avr_irq_register_notify(avr_io_getirq(avr, AVR_IOCTL_UART_GETIRQ('0'), UART_IRQ_OUTPUT), uart_out, NULL);
  for (i = 0; i < nmv; i++) {
    avr_raise_irq(avr_io_getirq(avr, AVR_IOCTL_ADC_GETIRQ, ADC_IRQ_ADC0 + i), (uint32_t)mv[i]);
  }
  icp_pin = avr_io_getirq(avr, AVR_IOCTL_IOPORT_GETIRQ('B'), IOPORT_IRQ_PIN0);
  avr_raise_irq(icp_pin, 0);
  avr_cycle_timer_register(avr, HZ / 1000, pulse_edge, NULL);

  if (use_pty) {
    char go[16];
    master = open_pty(path, sizeof path);
    printf("harness: pty %s\n", path);
    if (fgets(go, sizeof go, stdin) == NULL) {
      return 0;
    }
  }

  end = (avr_cycle_count_t)total_ms * (HZ / 1000);
  clock_gettime(CLOCK_MONOTONIC, &wall0);
  while (avr->cycle < end) {
    int st;
    if (realtime && avr->cycle >= next_pace) {
      /* Every emulated millisecond: wait until the wall clock catches up. */
      struct timespec now;
      long long ahead_ns;
      clock_gettime(CLOCK_MONOTONIC, &now);
      ahead_ns = (long long)(avr->cycle * 1000000000ULL / HZ) -
                 ((long long)(now.tv_sec - wall0.tv_sec) * 1000000000LL + (now.tv_nsec - wall0.tv_nsec));
      if (ahead_ns > 0) {
        struct timespec d = {(time_t)(ahead_ns / 1000000000LL), (long)(ahead_ns % 1000000000LL)};
        nanosleep(&d, NULL);
      }
      next_pace = avr->cycle + HZ / 1000;
    }
    st = avr_run(avr);
    if (st == cpu_Done || st == cpu_Crashed) {
      printf("harness: the firmware stopped (state %d) at cycle %llu\n", st, (unsigned long long)avr->cycle);
      return 1;
    }
  }
  flush_out();

  printf("harness: done cycles=%llu asleep=%llu bytes=%llu lines=%llu pulses=%llu spikes=%llu", (unsigned long long)avr->cycle,
         (unsigned long long)asleep, uart_bytes, uart_lines, pulses, glitches);
  if (syms != NULL) {
    char *s = strdup(syms), *tok, *save = NULL;
    for (tok = strtok_r(s, ",", &save); tok != NULL; tok = strtok_r(NULL, ",", &save)) {
      char *eq = strchr(tok, '=');
      unsigned long addr, v;
      int w;
      if (eq == NULL) {
        continue;
      }
      *eq = '\0';
      addr = strtoul(eq + 1, NULL, 16) & 0xFFFF;
      w = strchr(eq + 1, ':') ? atoi(strchr(eq + 1, ':') + 1) : 2;
      v = 0;
      for (i = w - 1; i >= 0; i--) {
        v = v << 8 | avr->data[addr + (unsigned long)i];
      }
      printf(" %s=%lu", tok, v);
    }
    free(s);
  }
  printf("\n");
  if (use_pty) {
    char buf[64];
    while (fgets(buf, sizeof buf, stdin) != NULL) {
    }
  }
  return 0;
}
