/*
 * Host tests of the protocol encoder, built with the system's C compiler
 * (cc -std=c99 -Wall -Wextra -Werror -pedantic) and run by the Go test
 * TestFirmwareEncoder in drivers/serial:
 *
 *   test_plenum_line GOLDEN OUT
 *
 * GOLDEN holds cases written by Plenum's Go encoder (serial.AppendFrame):
 * an "in" line with the readings and an "out" line with the frame; every
 * one must come out of this encoder byte for byte. OUT receives cases of
 * this encoder's own in the same format, for the Go decoder to read back.
 *
 *   in <seq> <ms> <key>:<value>:<decimals>:<m|c> ...
 *   out P1,...*XXXX
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "plenum_line.h"

static int failures;

#define CHECK(cond, ...)                                 \
  do {                                                   \
    if (!(cond)) {                                       \
      failures++;                                        \
      fprintf(stderr, "%s:%d: ", __FILE__, __LINE__);    \
      fprintf(stderr, __VA_ARGS__);                      \
      fputc('\n', stderr);                               \
    }                                                    \
  } while (0)

typedef struct {
  char key[PL_MAX_KEY + 2];
  long value;
  int decimals;
  int unit;
} reading;

typedef struct {
  unsigned long seq, ms;
  int n;
  reading r[PL_MAX_READINGS + 1];
} spec;

static int encode(const spec *s, char *buf, uint16_t cap) {
  pl_line l;
  int i;
  pl_line_begin(&l, buf, cap, (uint32_t)s->seq, (uint32_t)s->ms);
  for (i = 0; i < s->n; i++) {
    pl_line_add(&l, s->r[i].key, (int32_t)s->r[i].value, (uint8_t)s->r[i].decimals, (uint8_t)s->r[i].unit);
  }
  return pl_line_end(&l);
}

static void test_crc(void) {
  /* CRC catalogue (CRC RevEng), CRC-16/CCITT-FALSE alias CRC-16/IBM-3740:
   * check value 0x29B1 over "123456789" (from memory; the Go decoder's
   * test holds the same value). */
  CHECK(pl_crc16("123456789", 9) == 0x29B1, "crc16(123456789) = %04X, want 29B1", pl_crc16("123456789", 9));
  CHECK(pl_crc16("", 0) == 0xFFFF, "crc16 of nothing = %04X, want the initial FFFF", pl_crc16("", 0));
  {
    /* The byte-wise form against the bit-serial definition, every byte
     * value from several states. */
    unsigned s, b;
    for (s = 0; s < 0x10000; s += 0x1357) {
      for (b = 0; b < 256; b++) {
        unsigned c = (s ^ (b << 8)) & 0xFFFF;
        int i;
        for (i = 0; i < 8; i++) {
          c = (c & 0x8000) ? ((c << 1) ^ 0x1021) & 0xFFFF : (c << 1) & 0xFFFF;
        }
        CHECK(pl_crc16_update((uint16_t)s, (uint8_t)b) == c, "update(%04X, %02X) = %04X, want %04X", s, b,
              pl_crc16_update((uint16_t)s, (uint8_t)b), c);
      }
    }
  }
}

static void test_utoa(void) {
  static const struct {
    uint32_t v;
    const char *s;
  } cases[] = {{0, "0"}, {9, "9"}, {10, "10"}, {65535, "65535"}, {1000000000UL, "1000000000"}, {4294967295UL, "4294967295"}};
  size_t i;
  for (i = 0; i < sizeof cases / sizeof cases[0]; i++) {
    char out[11];
    uint8_t n = pl_utoa(cases[i].v, out);
    out[n] = '\0';
    CHECK(strcmp(out, cases[i].s) == 0, "utoa(%lu) = %s, want %s", (unsigned long)cases[i].v, out, cases[i].s);
  }
}

static void test_errors(void) {
  char buf[PL_MAX_LINE + 64];
  pl_line l;
  int i, r;
  static const char *bad_keys[] = {"", "A0", "0a", "a-b", "abcdefghi", "a b", "a0="};
  static const char *good_keys[] = {"a", "_", "a0", "abcdefgh", "t_1", "z9_"};

  /* A buffer too small for the header, for a reading, for the trailer. */
  CHECK(pl_line_begin(&l, buf, 8, 4294967295UL, 1) == PL_ERR_OVERFLOW, "header into 8 bytes");
  CHECK(pl_line_end(&l) == PL_ERR_OVERFLOW, "end after overflow");
  pl_line_begin(&l, buf, 12, 1, 2); /* "P1,1,2" is 6 bytes */
  CHECK(pl_line_add(&l, "a0", 12345, 0, PL_MILLIVOLTS) == PL_ERR_OVERFLOW, "reading into 6 free bytes");
  CHECK(l.len == 6, "a failed reading changed the line (len %u)", l.len);
  CHECK(pl_line_add(&l, "a", 1, 0, PL_COUNTS) == PL_ERR_OVERFLOW, "the first error sticks");
  CHECK(pl_line_end(&l) == PL_ERR_OVERFLOW, "end reports the first error");
  pl_line_begin(&l, buf, 11, 1, 2);
  CHECK(pl_line_end(&l) == PL_ERR_OVERFLOW, "trailer into 5 free bytes");
  pl_line_begin(&l, buf, 12, 1, 2);
  CHECK(pl_line_end(&l) == 12, "trailer into exactly 6 free bytes");

  for (i = 0; i < (int)(sizeof bad_keys / sizeof bad_keys[0]); i++) {
    pl_line_begin(&l, buf, sizeof buf, 1, 2);
    CHECK(pl_line_add(&l, bad_keys[i], 1, 0, PL_COUNTS) == PL_ERR_KEY, "key %s accepted", bad_keys[i]);
  }
  for (i = 0; i < (int)(sizeof good_keys / sizeof good_keys[0]); i++) {
    pl_line_begin(&l, buf, sizeof buf, 1, 2);
    CHECK(pl_line_add(&l, good_keys[i], 1, 0, PL_COUNTS) == PL_OK, "key %s refused", good_keys[i]);
  }

  pl_line_begin(&l, buf, sizeof buf, 1, 2);
  CHECK(pl_line_add(&l, "a", 1, 10, PL_COUNTS) == PL_ERR_DECIMALS, "10 decimals accepted");

  /* 32 readings fit; the 33rd does not. */
  pl_line_begin(&l, buf, sizeof buf, 1, 2);
  for (i = 0; i < PL_MAX_READINGS; i++) {
    CHECK(pl_line_add(&l, "a", i, 0, PL_COUNTS) == PL_OK, "reading %d refused", i);
  }
  CHECK(pl_line_add(&l, "a", 1, 0, PL_COUNTS) == PL_ERR_TOO_MANY, "reading 33 accepted");

  /* The 512-byte limit holds whatever room the buffer has. */
  pl_line_begin(&l, buf, sizeof buf, 4294967295UL, 4294967295UL);
  r = PL_OK;
  for (i = 0; i < PL_MAX_READINGS && r == PL_OK; i++) {
    r = pl_line_add(&l, "abcdefgh", -2147483647L - 1, 0, PL_MILLIVOLTS);
  }
  CHECK(r == PL_ERR_TOO_LONG, "a line past 512 bytes: %d", r);
  CHECK(l.len + 5 <= PL_MAX_LINE, "the line grew to %u bytes", l.len);
  CHECK(pl_line_end(&l) == PL_ERR_TOO_LONG, "end after too long");

  /* A line of exactly 512 bytes (without the newline) is allowed. */
  pl_line_begin(&l, buf, sizeof buf, 1, 2); /* 6 bytes */
  for (i = 0; i < 31; i++) {
    pl_line_add(&l, "abcdefgh", 1234567, 0, PL_MILLIVOLTS); /* 18 bytes each: 558 > 512, cut below */
    if (l.len + 5 + 18 > PL_MAX_LINE) {
      break;
    }
  }
  {
    /* fill to 507 bytes before the trailer with one reading of the right length */
    int room = PL_MAX_LINE - 5 - l.len; /* bytes left for ",key=value" */
    char key[9] = "a";
    long v = 1;
    int digits = room - 3; /* ",a=" */
    if (digits > 8) {
      int k = digits - 8;
      memset(key, 'k', (size_t)k + 1);
      key[k + 1] = '\0';
      digits = 8;
    }
    for (i = 1; i < digits; i++) {
      v *= 10;
    }
    CHECK(pl_line_add(&l, key, (int32_t)v, 0, PL_COUNTS) == PL_OK, "filling to 512 bytes (%s=%ld)", key, v);
    r = pl_line_end(&l);
    CHECK(r == PL_MAX_LINE + 1, "a full line is %d bytes, want %d", r, PL_MAX_LINE + 1);
  }

  /* Calls out of order. */
  {
    pl_line z;
    memset(&z, 0, sizeof z);
    CHECK(pl_line_add(&z, "a", 1, 0, PL_COUNTS) == PL_ERR_STATE, "add before begin");
    CHECK(pl_line_end(&z) == PL_ERR_STATE, "end before begin");
    pl_line_begin(&l, buf, sizeof buf, 1, 2);
    CHECK(pl_line_end(&l) > 0, "empty line");
    CHECK(pl_line_add(&l, "a", 1, 0, PL_COUNTS) == PL_ERR_STATE, "add after end");
  }
}

static void test_values(void) {
  static const struct {
    long v;
    int dec, unit;
    const char *want;
  } cases[] = {
      {0, 0, PL_COUNTS, "a=0"},          {0, 3, PL_MILLIVOLTS, "a=0m"},    {24995, 1, PL_MILLIVOLTS, "a=2499.5m"},
      {25000, 1, PL_MILLIVOLTS, "a=2500m"}, {5, 2, PL_COUNTS, "a=0.05"},   {-5, 2, PL_COUNTS, "a=-0.05"},
      {-120, 1, PL_MILLIVOLTS, "a=-12m"},   {1230, 3, PL_COUNTS, "a=1.23"}, {1, 9, PL_COUNTS, "a=0.000000001"},
      {2147483647L, 0, PL_COUNTS, "a=2147483647"}, {-2147483647L - 1, 9, PL_COUNTS, "a=-2.147483648"},
  };
  size_t i;
  for (i = 0; i < sizeof cases / sizeof cases[0]; i++) {
    char buf[64];
    pl_line l;
    int n;
    pl_line_begin(&l, buf, sizeof buf, 0, 0);
    pl_line_add(&l, "a", (int32_t)cases[i].v, (uint8_t)cases[i].dec, (uint8_t)cases[i].unit);
    n = pl_line_end(&l);
    CHECK(n > 0, "value %ld/%d: error %d", cases[i].v, cases[i].dec, n);
    if (n > 0) {
      size_t w = strlen(cases[i].want);
      CHECK(n == (int)(7 + w + 6) && memcmp(buf + 7, cases[i].want, w) == 0 && buf[6] == ',' && buf[7 + w] == '*',
            "value %ld/%d: %.*s, want P1,0,0,%s*CRC", cases[i].v, cases[i].dec, n, buf, cases[i].want);
    }
  }
}

static int parse_spec(char *s, spec *out) {
  char *tok = strtok(s, " \n");
  out->n = 0;
  if (tok == NULL || strcmp(tok, "in") != 0) {
    return 0;
  }
  tok = strtok(NULL, " \n");
  if (tok == NULL) {
    return 0;
  }
  out->seq = strtoul(tok, NULL, 10);
  tok = strtok(NULL, " \n");
  if (tok == NULL) {
    return 0;
  }
  out->ms = strtoul(tok, NULL, 10);
  while ((tok = strtok(NULL, " \n")) != NULL) {
    reading *r = &out->r[out->n];
    char *p = strchr(tok, ':');
    if (p == NULL || out->n == PL_MAX_READINGS || p - tok > PL_MAX_KEY) {
      return 0;
    }
    memcpy(r->key, tok, (size_t)(p - tok));
    r->key[p - tok] = '\0';
    r->value = strtol(p + 1, &p, 10);
    if (*p != ':') {
      return 0;
    }
    r->decimals = (int)strtol(p + 1, &p, 10);
    if (*p != ':' || (p[1] != 'm' && p[1] != 'c')) {
      return 0;
    }
    r->unit = p[1] == 'm' ? PL_MILLIVOLTS : PL_COUNTS;
    out->n++;
  }
  return 1;
}

static void test_golden(const char *path) {
  FILE *f = fopen(path, "r");
  static char in[4096], out[4096];
  int cases = 0;
  if (f == NULL) {
    failures++;
    perror(path);
    return;
  }
  while (fgets(in, sizeof in, f) != NULL) {
    spec s;
    char buf[PL_MAX_LINE + 8];
    int n;
    size_t w;
    if (in[0] == '#' || in[0] == '\n') {
      continue;
    }
    if (fgets(out, sizeof out, f) == NULL || strncmp(out, "out ", 4) != 0) {
      CHECK(0, "%s: an in line without its out line", path);
      break;
    }
    CHECK(parse_spec(in, &s), "%s: bad in line", path);
    n = encode(&s, buf, sizeof buf);
    w = strlen(out + 4); /* with its '\n' */
    CHECK(n > 0 && (size_t)n == w && memcmp(buf, out + 4, w) == 0, "golden case %d: C wrote %.*s Go wrote %s", cases + 1,
          n > 0 ? n : 0, buf, out + 4);
    cases++;
  }
  fclose(f);
  CHECK(cases >= 10, "%s: only %d cases", path, cases);
  printf("golden: %d Go-encoded lines reproduced\n", cases);
}

/* lcg is a fixed pseudo-random sequence, so that the cases are the same
 * on every run. */
static uint32_t lcg_state = 12345;
static uint32_t lcg(void) {
  lcg_state = lcg_state * 1103515245UL + 12345UL;
  return lcg_state >> 1;
}

static void write_spec(FILE *f, const spec *s) {
  int i;
  fprintf(f, "in %lu %lu", s->seq, s->ms);
  for (i = 0; i < s->n; i++) {
    fprintf(f, " %s:%ld:%d:%c", s->r[i].key, s->r[i].value, s->r[i].decimals, s->r[i].unit == PL_MILLIVOLTS ? 'm' : 'c');
  }
  fputc('\n', f);
}

static void emit_cases(const char *path) {
  FILE *f = fopen(path, "w");
  int c, i, written = 0;
  static const char keys[] = "abcdefghijklmnopqrstuvwxyz_0123456789";
  if (f == NULL) {
    failures++;
    perror(path);
    return;
  }
  fprintf(f, "# written by test_plenum_line (the C encoder); read by drivers/serial TestFirmwareEncoder\n");
  for (c = 0; c < 300; c++) {
    spec s;
    char buf[PL_MAX_LINE + 8];
    int n;
    s.seq = c < 2 ? (c == 0 ? 0UL : 4294967295UL) : (unsigned long)lcg();
    s.ms = c < 2 ? (c == 0 ? 4294967295UL : 0UL) : (unsigned long)(lcg() % 100000000UL);
    s.n = c == 2 ? PL_MAX_READINGS : (int)(lcg() % 17);
    for (i = 0; i < s.n; i++) {
      reading *r = &s.r[i];
      int kl = c == 2 ? 2 : 1 + (int)(lcg() % PL_MAX_KEY), k;
      r->key[0] = keys[lcg() % 27];
      for (k = 1; k < kl; k++) {
        r->key[k] = keys[lcg() % 37];
      }
      r->key[kl] = '\0';
      switch (lcg() % 4) {
      case 0: /* an ADC count */
        r->value = (long)(lcg() % 1024);
        break;
      case 1: /* millivolts */
        r->value = (long)(lcg() % 5001);
        break;
      case 2: /* anything */
        r->value = (long)(int32_t)(lcg() * 2U + (lcg() & 1U));
        break;
      default: /* small, either sign */
        r->value = (long)(lcg() % 2001) - 1000;
      }
      r->decimals = (int)(lcg() % 4 == 0 ? lcg() % 10 : 0);
      r->unit = (int)(lcg() % 2);
      if (c == 2) { /* 32 readings within 512 bytes */
        r->value %= 10000;
        r->decimals = 0;
      }
    }
    n = encode(&s, buf, sizeof buf);
    if (n == PL_ERR_TOO_LONG && c != 2) {
      continue; /* a random case past 512 bytes */
    }
    CHECK(n > 0, "case %d: error %d", c, n);
    if (n <= 0) {
      continue;
    }
    write_spec(f, &s);
    fprintf(f, "out %.*s", n, buf);
    written++;
  }
  fclose(f);
  printf("emitted: %d C-encoded lines\n", written);
}

int main(int argc, char **argv) {
  test_crc();
  test_utoa();
  test_errors();
  test_values();
  if (argc > 1) {
    test_golden(argv[1]);
  }
  if (argc > 2) {
    emit_cases(argv[2]);
  }
  if (failures > 0) {
    fprintf(stderr, "%d failures\n", failures);
    return 1;
  }
  printf("encoder tests passed\n");
  return 0;
}
