/*
 * plenum_line.h: an encoder of Plenum's serial line protocol, version 1
 * (drivers/serial/PROTOCOL.md), for microcontrollers.
 *
 * Portable C99: no dynamic memory, no printf, no floating point, no 32-bit
 * division. The caller supplies the buffer; every call checks its room and
 * the protocol's limits (32 readings, 512 bytes before the line end, key
 * syntax), and the first error sticks until pl_line_begin starts over.
 *
 *   pl_line l;
 *   char buf[128];
 *   pl_line_begin(&l, buf, sizeof buf, seq, ms);
 *   pl_line_add(&l, "a0", 2480, 0, PL_MILLIVOLTS);   ->  a0=2480m
 *   pl_line_add(&l, "t1", 24995, 1, PL_MILLIVOLTS);  ->  t1=2499.5m
 *   pl_line_add(&l, "a2", 512, 0, PL_COUNTS);        ->  a2=512
 *   int n = pl_line_end(&l);   n > 0: buf[0..n) is "P1,...*CRC\n"
 *
 * A value is a signed integer scaled by 10^-decimals (decimals 0..9) and is
 * written in the shortest form that reads back exactly: trailing zeros of
 * the fraction and a bare point are left out, as Plenum's own encoder
 * (serial.AppendFrame) writes the same number.
 */
#ifndef PLENUM_LINE_H
#define PLENUM_LINE_H

#include <stddef.h>
#include <stdint.h>

/* Limits of protocol version 1. */
#define PL_MAX_READINGS 32
#define PL_MAX_KEY 8
#define PL_MAX_LINE 512 /* bytes of a line, without its '\n' */
#define PL_MAX_DECIMALS 9

/* The unit of a reading: raw ADC counts (no suffix) or millivolts (m). */
#define PL_COUNTS 0
#define PL_MILLIVOLTS 1

/* Error codes (negative results of the calls). */
enum {
  PL_OK = 0,
  PL_ERR_OVERFLOW = -1, /* the caller's buffer is too small */
  PL_ERR_TOO_MANY = -2, /* more than PL_MAX_READINGS readings */
  PL_ERR_KEY = -3,      /* a key outside 1-8 of a-z _ (digits after the first) */
  PL_ERR_TOO_LONG = -4, /* the line would pass PL_MAX_LINE bytes */
  PL_ERR_DECIMALS = -5, /* decimals above PL_MAX_DECIMALS */
  PL_ERR_STATE = -6     /* a call on a line not begun, or already ended */
};

/* One line being built. Its fields are the encoder's; read them only
 * through the calls. */
typedef struct {
  char *buf;
  uint16_t cap;
  uint16_t len;
  uint8_t n;     /* readings so far */
  int8_t err;    /* first error, or PL_OK */
  uint8_t state; /* 0: not begun, 1: open, 2: ended */
} pl_line;

/* pl_crc16_update feeds one byte into a CRC-16/CCITT-FALSE (polynomial
 * 0x1021, no reflection, no final XOR); start from 0xFFFF. */
uint16_t pl_crc16_update(uint16_t crc, uint8_t b);

/* pl_crc16 returns the CRC-16/CCITT-FALSE of n bytes. */
uint16_t pl_crc16(const void *p, size_t n);

/* pl_line_begin starts a line "P1,<seq>,<ms>" in buf (cap bytes). */
int pl_line_begin(pl_line *l, char *buf, uint16_t cap, uint32_t seq, uint32_t ms);

/* pl_line_add appends ",<key>=<value>[m]": value × 10^-decimals, in
 * millivolts (unit PL_MILLIVOLTS) or counts (PL_COUNTS). Returns PL_OK or
 * the line's (first) error; a failed reading leaves the line as it was. */
int pl_line_add(pl_line *l, const char *key, int32_t value, uint8_t decimals, uint8_t unit);

/* pl_line_end appends "*<CRC>\n" (upper-case hex) and returns the line's
 * length in bytes, or its first error (negative). */
int pl_line_end(pl_line *l);

/* pl_utoa writes v in decimal into out (at least 10 bytes, not
 * terminated) and returns the number of digits: repeated subtraction of
 * powers of ten, no division. */
uint8_t pl_utoa(uint32_t v, char *out);

#endif
