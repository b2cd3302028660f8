/*
 * config.h: every compile-time setting of Plenum's reference firmware for
 * the ATmega328P, in one place. The numeric ones can also be given to
 * make, e.g.
 *   make PM_BAUD=1000000UL PM_FRAME_PERIOD_MS=4
 * (the Makefile passes PM_* variables on as -D flags); edit the inputs and
 * the keys here. A key outside protocol v1's syntax makes the encoder
 * refuse every frame (the host then sees none), so keep to it.
 */
#ifndef PM_CONFIG_H
#define PM_CONFIG_H

/* The CPU clock of the common 16 MHz boards. */
#ifndef F_CPU
#define F_CPU 16000000UL
#endif

/* UART baud rate, 8N1 with double speed (U2X0): 115200 (actual 117647,
 * +2.1%) or 1000000 (exact). Say the same rate in Plenum's config. */
#ifndef PM_BAUD
#define PM_BAUD 115200UL
#endif

/* Time between frames in milliseconds: the frame rate is 1000 / period
 * (10 ms: 100 frames/s). Every frame takes one burst of conversions. */
#ifndef PM_FRAME_PERIOD_MS
#define PM_FRAME_PERIOD_MS 10
#endif

/* The analog inputs: X(key, ADC channel). Keys follow protocol v1 (1-8
 * of a-z, _, digits after the first); channels 0-5 are A0-A5 of the DIP
 * package (PC0-PC5), 6-7 exist on TQFP boards only. At most 8 inputs. */
#ifndef PM_INPUTS
#define PM_INPUTS(X) X("a0", 0) X("a1", 1) X("a2", 2) X("a3", 3) X("a4", 4) X("a5", 5)
#endif

/* Conversions averaged per input and frame: 1, 2, 4, 8 or 16. Averaging
 * N conversions lowers random noise by sqrt(N); it adds resolution (half
 * a bit per doubling) only where at least 1 LSB of noise dithers the
 * input. Without such noise the result stays a 10-bit conversion. */
#ifndef PM_OVERSAMPLE
#define PM_OVERSAMPLE 4
#endif

/* Conversions thrown away after switching the multiplexer, so that the
 * sample-and-hold capacitor settles on a source of up to about 10 kOhm. */
#ifndef PM_DISCARD
#define PM_DISCARD 1
#endif

/* ADC clock prescaler, 128 (125 kHz, within the 50-200 kHz the data
 * sheet asks for full resolution; 104 us a conversion) or 64 (250 kHz,
 * 52 us, slightly less accurate). */
#ifndef PM_ADC_PRESCALE
#define PM_ADC_PRESCALE 128
#endif

/* The reference: AVcc, in millivolts. Measure your board's 5 V pin and
 * put the figure here; every reading scales with it. */
#ifndef PM_VREF_MV
#define PM_VREF_MV 5000UL
#endif

/* Engine speed from the input-capture pin ICP1 (PB0, Arduino D8). */
#ifndef PM_SPEED
#define PM_SPEED 1 /* 0 leaves engine speed out (and ICP1 unused) */
#endif
#ifndef PM_SPEED_KEY
#define PM_SPEED_KEY "espd" /* the reading's key */
#endif
/* Pulses per crankshaft revolution of the conditioned signal: a
 * four-stroke engine's tachometer output gives cylinders / 2; a crank
 * trigger wheel with one tooth gives 1. */
#ifndef PM_PULSES_PER_REV
#define PM_PULSES_PER_REV 1
#endif
/* Capture on the rising (1) or falling (0) edge of PB0. */
#ifndef PM_EDGE_RISING
#define PM_EDGE_RISING 1
#endif
/* Enable the internal pull-up on PB0 (1) for an open-collector
 * conditioner output, or leave it off (0) for a push-pull one. */
#ifndef PM_ICP_PULLUP
#define PM_ICP_PULLUP 1
#endif
/* With no pulse for this long the engine counts as stopped: speed 0. */
#ifndef PM_SPEED_TIMEOUT_MS
#define PM_SPEED_TIMEOUT_MS 1500UL
#endif
/* Glitch filter: an edge that comes sooner than PM_SPEED_MAX_RPM allows,
 * or sooner than PM_GLITCH_PERCENT of the last accepted period, is
 * ignored (ringing, a spark's interference); the period runs on from the
 * last good edge. */
#ifndef PM_SPEED_MAX_RPM
#define PM_SPEED_MAX_RPM 12000UL
#endif
#ifndef PM_GLITCH_PERCENT
#define PM_GLITCH_PERCENT 40UL
#endif

/* Transmit ring buffer in bytes, a power of two. A frame that does not
 * fit is skipped whole; its sequence number is used all the same, so
 * the host counts it in dropped_frames. */
#ifndef PM_TX_RING
#define PM_TX_RING 512
#endif

#endif
