/*
 * Plenum's reference firmware for the ATmega328P at 16 MHz: samples the
 * configured analog inputs on a fixed frame clock, measures engine speed
 * on the input-capture pin and sends protocol v1 lines
 * (drivers/serial/PROTOCOL.md) from an interrupt-driven ring buffer.
 * Settings: config.h. Documentation: ../README.md.
 *
 * Timers and interrupts:
 *   Timer0  CTC at 1 kHz: the millisecond counter; every
 *           PM_FRAME_PERIOD_MS it starts a burst of conversions.
 *   ADC     interrupt-driven burst: per input, PM_DISCARD conversions
 *           thrown away after the multiplexer switch, then PM_OVERSAMPLE
 *           summed. The last one hands the sums to the main loop.
 *   Timer1  free-running at F_CPU/8 (0.5 us), input capture on ICP1 with
 *           the noise canceller; overflows extend it to 32 bits.
 *   USART0  the UDR-empty interrupt drains the ring buffer.
 * The main loop sleeps (idle mode) until a burst is complete, then
 * encodes the line and queues it.
 */
#include <avr/interrupt.h>
#include <avr/io.h>
#include <avr/sleep.h>
#include <avr/wdt.h>
#include <stdint.h>
#include <util/atomic.h>

#include "config.h"
#include "plenum_line.h"

/* ---- the inputs ---- */

#define PM_KEY(k, ch) k,
#define PM_CH(k, ch) ch,
#define PM_ONE(k, ch) +1
static const char *const input_key[] = {PM_INPUTS(PM_KEY)};
static const uint8_t input_ch[] = {PM_INPUTS(PM_CH)};
#define PM_N_INPUTS (0 PM_INPUTS(PM_ONE))

/* ---- checks of config.h ---- */

#define PM_UBRR ((F_CPU + 4UL * PM_BAUD) / (8UL * PM_BAUD) - 1UL)
#define PM_BAUD_ACTUAL (F_CPU / (8UL * (PM_UBRR + 1UL)))
#define PM_T1_HZ (F_CPU / 8UL)
#define PM_CONV_PER_FRAME ((uint32_t)PM_N_INPUTS * (PM_DISCARD + PM_OVERSAMPLE))
#define PM_BURST_US (PM_CONV_PER_FRAME * 13UL * PM_ADC_PRESCALE / (F_CPU / 1000000UL))

_Static_assert(PM_N_INPUTS >= 1 && PM_N_INPUTS <= 8, "PM_INPUTS: 1 to 8 inputs");
_Static_assert(PM_OVERSAMPLE == 1 || PM_OVERSAMPLE == 2 || PM_OVERSAMPLE == 4 || PM_OVERSAMPLE == 8 ||
                   PM_OVERSAMPLE == 16,
               "PM_OVERSAMPLE: 1, 2, 4, 8 or 16");
_Static_assert(PM_ADC_PRESCALE == 128 || PM_ADC_PRESCALE == 64, "PM_ADC_PRESCALE: 128 or 64");
_Static_assert(PM_FRAME_PERIOD_MS >= 1 && PM_FRAME_PERIOD_MS <= 1000, "PM_FRAME_PERIOD_MS: 1 to 1000");
_Static_assert(PM_BURST_US + 200UL < PM_FRAME_PERIOD_MS * 1000UL,
               "the conversions of one frame do not fit its period: fewer inputs, less oversampling or a longer period");
_Static_assert(PM_BAUD_ACTUAL * 1000UL / PM_BAUD >= 975UL && PM_BAUD_ACTUAL * 1000UL / PM_BAUD <= 1025UL,
               "PM_BAUD: more than 2.5% off at this clock");
_Static_assert(PM_UBRR <= 4095UL, "PM_BAUD: too slow for the baud-rate register");
_Static_assert((PM_TX_RING & (PM_TX_RING - 1)) == 0 && PM_TX_RING >= 128 && PM_TX_RING <= 1024,
               "PM_TX_RING: a power of two, 128 to 1024");
_Static_assert(PM_PULSES_PER_REV >= 1 && PM_PULSES_PER_REV <= 64, "PM_PULSES_PER_REV: 1 to 64");
_Static_assert(PM_SPEED_TIMEOUT_MS >= 100UL && PM_SPEED_TIMEOUT_MS <= 60000UL, "PM_SPEED_TIMEOUT_MS: 100 to 60000");
_Static_assert(PM_GLITCH_PERCENT < 100UL, "PM_GLITCH_PERCENT: below 100");

/* Timer1 ticks of the shortest accepted period and of the timeout. */
#define PM_MIN_TICKS (60UL * PM_T1_HZ / (PM_SPEED_MAX_RPM * PM_PULSES_PER_REV))
#define PM_TIMEOUT_TICKS (PM_SPEED_TIMEOUT_MS * (PM_T1_HZ / 1000UL))
/* Engine speed in 0.1 rpm = PM_RPM10_NUM / period in ticks. */
#define PM_RPM10_NUM (600UL * PM_T1_HZ / PM_PULSES_PER_REV)

/* ---- the millisecond counter and the frame clock (Timer0) ---- */

static volatile uint32_t ms_now;
static uint8_t frame_tick;

/* ---- the conversions (ADC) ---- */

static volatile uint16_t adc_sum[PM_N_INPUTS]; /* the burst in progress */
static volatile uint8_t adc_input, adc_count, adc_busy;
static volatile uint32_t burst_ms;     /* ms counter at the start of the burst in progress */
static volatile uint16_t ready_sum[PM_N_INPUTS]; /* the last complete burst */
static volatile uint32_t ready_ms;
static volatile uint8_t ready;
static volatile uint16_t bursts_overrun; /* frame ticks that found a burst still running */

#define PM_ADMUX(ch) (uint8_t)(_BV(REFS0) | ((ch) & 0x0F)) /* AVcc reference, right-adjusted */
#if PM_ADC_PRESCALE == 128
#define PM_ADPS (_BV(ADPS2) | _BV(ADPS1) | _BV(ADPS0))
#else
#define PM_ADPS (_BV(ADPS2) | _BV(ADPS1))
#endif

ISR(TIMER0_COMPA_vect) {
  uint32_t now = ms_now + 1;
  ms_now = now;
  if (++frame_tick < PM_FRAME_PERIOD_MS) {
    return;
  }
  frame_tick = 0;
  if (adc_busy) {
    bursts_overrun++;
    return;
  }
  adc_busy = 1;
  burst_ms = now;
  adc_input = 0;
  adc_count = 0;
  ADMUX = PM_ADMUX(input_ch[0]);
  ADCSRA |= _BV(ADSC);
}

ISR(ADC_vect) {
  uint16_t v = ADC;
  uint8_t i = adc_input, c = adc_count + 1;
  if (c > PM_DISCARD) {
    adc_sum[i] += v;
  }
  if (c < PM_DISCARD + PM_OVERSAMPLE) {
    adc_count = c;
    ADCSRA |= _BV(ADSC);
    return;
  }
  adc_count = 0;
  if (++i < PM_N_INPUTS) {
    adc_input = i;
    ADMUX = PM_ADMUX(input_ch[i]);
    ADCSRA |= _BV(ADSC);
    return;
  }
  /* The burst is complete: hand it over, start the next from zero. */
  for (i = 0; i < PM_N_INPUTS; i++) {
    ready_sum[i] = adc_sum[i];
    adc_sum[i] = 0;
  }
  ready_ms = burst_ms;
  ready = 1;
  adc_busy = 0;
}

/* ---- engine speed (Timer1 input capture) ---- */
#if PM_SPEED

static volatile uint16_t t1_high;      /* Timer1 overflows: the high half of the tick count */
static volatile uint32_t last_edge;    /* tick of the last accepted edge */
static volatile uint32_t last_period;  /* ticks between the last two accepted edges, 0: none */
static volatile uint32_t acc_ticks;    /* accepted periods since the last frame, summed */
static volatile uint8_t acc_n;         /* and counted */
static volatile uint8_t have_edge;     /* last_edge is valid */
static volatile uint16_t glitches;     /* edges ignored by the filter */

ISR(TIMER1_OVF_vect) { t1_high++; }

ISR(TIMER1_CAPT_vect) {
  uint16_t icr = ICR1;
  uint16_t high = t1_high;
  /* An overflow pending but not yet counted happened before this capture
   * when the captured count is small. */
  if ((TIFR1 & _BV(TOV1)) && icr < 0x8000) {
    high++;
  }
  uint32_t now = ((uint32_t)high << 16) | icr;
  if (have_edge) {
    uint32_t p = now - last_edge;
    if (p < PM_TIMEOUT_TICKS) {
      if (p < PM_MIN_TICKS || (last_period != 0 && p < last_period / 100UL * PM_GLITCH_PERCENT)) {
        glitches++;
        return; /* a glitch: keep measuring from the last good edge */
      }
      if (acc_n < 255) {
        acc_ticks += p;
        acc_n++;
      }
      last_period = p;
    } else {
      last_period = 0; /* the first edge after a stop starts afresh */
    }
  }
  last_edge = now;
  have_edge = 1;
}

/* t1_now returns the 32-bit tick count; call with interrupts off. */
static uint32_t t1_now(void) {
  uint16_t lo = TCNT1;
  uint16_t high = t1_high;
  if ((TIFR1 & _BV(TOV1)) && lo < 0x8000) {
    high++;
  }
  return ((uint32_t)high << 16) | lo;
}

/* speed_rpm10 returns engine speed in 0.1 rpm for the frame now closing:
 * the mean of the periods that ended during it; with none, the last value,
 * but no more than the time since the last edge allows (so that a
 * stopping engine runs down), and 0 after the timeout. */
static uint32_t speed_rpm10(void) {
  static uint32_t rpm10;
  uint32_t ticks, since, period;
  uint8_t n, have;
  ATOMIC_BLOCK(ATOMIC_RESTORESTATE) {
    ticks = acc_ticks;
    n = acc_n;
    acc_ticks = 0;
    acc_n = 0;
    have = have_edge;
    since = t1_now() - last_edge;
    period = last_period;
    if (have && since >= PM_TIMEOUT_TICKS) {
      have_edge = 0;
      last_period = 0;
      have = 0;
    }
  }
  if (!have) {
    rpm10 = 0;
  } else if (n > 0) {
    rpm10 = PM_RPM10_NUM / (ticks / n);
  } else if (period == 0) {
    rpm10 = 0; /* one edge only: no period yet */
  } else if (since > period) {
    uint32_t bound = PM_RPM10_NUM / since;
    if (bound < rpm10) {
      rpm10 = bound;
    }
  }
  return rpm10;
}
#endif

/* ---- the UART and its ring buffer ---- */

static volatile uint8_t tx_ring[PM_TX_RING];
static volatile uint16_t tx_head; /* written by the main loop */
static volatile uint16_t tx_tail; /* written by the UDRE interrupt */
static volatile uint32_t frames_skipped;

ISR(USART_UDRE_vect) {
  uint16_t t = tx_tail;
  if (t == tx_head) {
    UCSR0B &= (uint8_t)~_BV(UDRIE0);
    return;
  }
  UDR0 = tx_ring[t];
  tx_tail = (t + 1) & (PM_TX_RING - 1);
}

/* tx_queue queues n bytes whole, or none if they do not fit. */
static uint8_t tx_queue(const char *s, uint16_t n) {
  uint16_t head = tx_head, tail, i;
  ATOMIC_BLOCK(ATOMIC_RESTORESTATE) { tail = tx_tail; }
  if (((tail - head - 1) & (PM_TX_RING - 1)) < n) {
    return 0;
  }
  for (i = 0; i < n; i++) {
    tx_ring[head] = (uint8_t)s[i];
    head = (head + 1) & (PM_TX_RING - 1);
  }
  ATOMIC_BLOCK(ATOMIC_RESTORESTATE) {
    tx_head = head;
    UCSR0B |= _BV(UDRIE0);
  }
  return 1;
}

/* ---- setup and the main loop ---- */

static void setup(void) {
  uint8_t i, didr = 0;
  /* Unused pins: inputs with pull-ups, so that none floats. Analog inputs
   * stay without (a pull-up would load the sensor); PD1 is TXD. */
  DDRB = 0;
  PORTB = (uint8_t)~_BV(PB0);
#if PM_ICP_PULLUP
  PORTB |= _BV(PB0);
#endif
  DDRC = 0;
  PORTC = 0;
  for (i = 0; i < PM_N_INPUTS; i++) {
    if (input_ch[i] < 6) {
      didr |= (uint8_t)_BV(input_ch[i]);
    }
  }
  PORTC = (uint8_t)(~didr & 0x3F);
  DIDR0 = didr; /* no digital input buffer on the analog inputs */
  DDRD = _BV(PD1);
  PORTD = (uint8_t)~_BV(PD1);

  /* USART0: 8N1, double speed, transmitter only (U2X0 before the rate:
   * simavr computes the bit time when UBRR0L is written). */
  UCSR0A = _BV(U2X0);
  UBRR0 = (uint16_t)PM_UBRR;
  UCSR0C = _BV(UCSZ01) | _BV(UCSZ00);
  UCSR0B = _BV(TXEN0);

  /* ADC: AVcc reference, interrupt on completion. */
  ADMUX = PM_ADMUX(input_ch[0]);
  ADCSRA = _BV(ADEN) | _BV(ADIE) | PM_ADPS;

#if PM_SPEED
  /* Timer1: normal mode, F_CPU/8, input capture with noise canceller. */
  TCCR1A = 0;
  TCCR1B = _BV(ICNC1) | (PM_EDGE_RISING ? _BV(ICES1) : 0) | _BV(CS11);
  TIFR1 = _BV(ICF1) | _BV(TOV1);
  TIMSK1 = _BV(ICIE1) | _BV(TOIE1);
#endif

  /* Timer0: CTC, F_CPU/64, 250 counts: 1 kHz. */
  TCCR0A = _BV(WGM01);
  OCR0A = (uint8_t)(F_CPU / 64UL / 1000UL - 1UL);
  TCCR0B = _BV(CS01) | _BV(CS00);
  TIMSK0 = _BV(OCIE0A);

  set_sleep_mode(SLEEP_MODE_IDLE);
}

int main(void) {
  static char line[160];
  uint32_t seq = 0;
  uint16_t sums[PM_N_INPUTS];
  uint32_t ms;
  uint8_t i;

  wdt_enable(WDTO_250MS);
  setup();
  sei();
  for (;;) {
    pl_line l;
    int n;
    wdt_reset();
    cli();
    if (!ready) {
      /* Sleep until an interrupt; the instruction after sei runs before
       * any interrupt, so none is missed between the test and the sleep. */
      sleep_enable();
      sei();
      sleep_cpu();
      sleep_disable();
      continue;
    }
    for (i = 0; i < PM_N_INPUTS; i++) {
      sums[i] = ready_sum[i];
    }
    ms = ready_ms;
    ready = 0;
    sei();

    pl_line_begin(&l, line, sizeof line, seq, ms);
    for (i = 0; i < PM_N_INPUTS; i++) {
      /* Millivolts by the data sheet's transfer function
       * code = Vin * 1024 / Vref, rounded to the nearest millivolt. */
      uint32_t mv = ((uint32_t)sums[i] * PM_VREF_MV + 512UL * PM_OVERSAMPLE) / (1024UL * PM_OVERSAMPLE);
      pl_line_add(&l, input_key[i], (int32_t)mv, 0, PL_MILLIVOLTS);
    }
#if PM_SPEED
    /* Engine speed in rpm with one decimal, sent as millivolts so that an
     * identity calibration in Plenum's config maps it (see README). */
    pl_line_add(&l, PM_SPEED_KEY, (int32_t)speed_rpm10(), 1, PL_MILLIVOLTS);
#endif
    n = pl_line_end(&l);
    /* A frame that does not fit the ring is skipped, but its sequence
     * number is spent: the host sees the gap and counts the frame in
     * dropped_frames. An encoder error (a key that breaks the protocol)
     * would show the same way; config.h's keys are checked by hand. */
    if (n <= 0 || !tx_queue(line, (uint16_t)n)) {
      frames_skipped++;
    }
    seq++;
  }
}
