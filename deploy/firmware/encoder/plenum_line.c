/* plenum_line.c: the protocol version 1 encoder; see plenum_line.h. */
#include "plenum_line.h"

/* crc_step is the byte-wise form of the bit-serial shift register for
 * 0x1021 (x^16 + x^12 + x^5 + 1): eight shifts folded into three terms. */
static inline uint16_t crc_step(uint16_t crc, uint8_t b) {
  uint8_t x = (uint8_t)((crc >> 8) ^ b);
  x ^= (uint8_t)(x >> 4);
  return (uint16_t)((uint16_t)(crc << 8) ^ (uint16_t)((uint16_t)x << 12) ^ (uint16_t)((uint16_t)x << 5) ^ x);
}

uint16_t pl_crc16_update(uint16_t crc, uint8_t b) { return crc_step(crc, b); }

uint16_t pl_crc16(const void *p, size_t n) {
  const uint8_t *s = (const uint8_t *)p;
  uint16_t crc = 0xFFFF;
  while (n--) {
    crc = crc_step(crc, *s++);
  }
  return crc;
}

static const uint32_t pow10_tab[10] = {1000000000UL, 100000000UL, 10000000UL, 1000000UL, 100000UL,
                                       10000UL,      1000UL,      100UL,      10UL,      1UL};

uint8_t pl_utoa(uint32_t v, char *out) {
  uint8_t n = 0, i = 0;
  /* Most values are small: skip the places they cannot fill. */
  if (v < 100000UL) {
    i = 5;
  }
  for (; i < 10; i++) {
    char d = '0';
    while (v >= pow10_tab[i]) {
      v -= pow10_tab[i];
      d++;
    }
    if (d != '0' || n > 0 || i == 9) {
      out[n++] = d;
    }
  }
  return n;
}

static int fail(pl_line *l, int err) {
  if (l->err == PL_OK) {
    l->err = (int8_t)err;
  }
  return l->err;
}

/* put appends n bytes if both the buffer and the protocol's line limit
 * (keeping room for the 5-byte "*CRC" trailer) allow it. */
static int put(pl_line *l, const char *s, uint16_t n) {
  uint16_t i;
  if ((uint32_t)l->len + n + 5 > PL_MAX_LINE) {
    return PL_ERR_TOO_LONG;
  }
  if ((uint32_t)l->len + n > l->cap) {
    return PL_ERR_OVERFLOW;
  }
  for (i = 0; i < n; i++) {
    l->buf[l->len + i] = s[i];
  }
  l->len = (uint16_t)(l->len + n);
  return PL_OK;
}

int pl_line_begin(pl_line *l, char *buf, uint16_t cap, uint32_t seq, uint32_t ms) {
  char tmp[24];
  uint8_t n = 0;
  l->buf = buf;
  l->cap = cap;
  l->len = 0;
  l->n = 0;
  l->err = PL_OK;
  l->state = 1;
  tmp[n++] = 'P';
  tmp[n++] = '1';
  tmp[n++] = ',';
  n = (uint8_t)(n + pl_utoa(seq, tmp + n));
  tmp[n++] = ',';
  n = (uint8_t)(n + pl_utoa(ms, tmp + n));
  return fail(l, put(l, tmp, n));
}

static int valid_key(const char *k) {
  uint8_t i = 0;
  for (; k[i] != '\0'; i++) {
    char c = k[i];
    if (i == PL_MAX_KEY) {
      return 0;
    }
    if (!((c >= 'a' && c <= 'z') || c == '_' || (i > 0 && c >= '0' && c <= '9'))) {
      return 0;
    }
  }
  return i > 0;
}

int pl_line_add(pl_line *l, const char *key, int32_t value, uint8_t decimals, uint8_t unit) {
  char tmp[1 + PL_MAX_KEY + 1 + 1 + 11 + 1 + 1]; /* ,key=-digits.m */
  char digits[10];
  uint32_t mag;
  uint8_t nd, n = 0, i, frac;
  int err;
  if (l->state != 1) {
    return l->state == 0 ? PL_ERR_STATE : fail(l, PL_ERR_STATE);
  }
  if (l->err != PL_OK) {
    return l->err;
  }
  if (l->n == PL_MAX_READINGS) {
    return fail(l, PL_ERR_TOO_MANY);
  }
  if (!valid_key(key)) {
    return fail(l, PL_ERR_KEY);
  }
  if (decimals > PL_MAX_DECIMALS) {
    return fail(l, PL_ERR_DECIMALS);
  }
  tmp[n++] = ',';
  for (i = 0; key[i] != '\0'; i++) {
    tmp[n++] = key[i];
  }
  tmp[n++] = '=';
  /* The magnitude, without overflowing on INT32_MIN. */
  mag = value < 0 ? (uint32_t)(-(value + 1)) + 1U : (uint32_t)value;
  nd = pl_utoa(mag, digits);
  /* Leave out trailing zeros of the fraction. */
  frac = decimals;
  while (frac > 0 && nd > 0 && digits[nd - 1] == '0' && mag != 0) {
    nd--;
    frac--;
  }
  if (mag == 0) {
    frac = 0; /* zero is "0", never "-0" or "0.0" */
  }
  if (value < 0 && mag != 0) {
    tmp[n++] = '-';
  }
  if (frac == 0) {
    for (i = 0; i < nd; i++) {
      tmp[n++] = digits[i];
    }
  } else {
    /* nd digits of which the last frac are decimals; pad with zeros
     * when the number is below one. */
    if (nd <= frac) {
      tmp[n++] = '0';
      tmp[n++] = '.';
      for (i = nd; i < frac; i++) {
        tmp[n++] = '0';
      }
      for (i = 0; i < nd; i++) {
        tmp[n++] = digits[i];
      }
    } else {
      for (i = 0; i < nd; i++) {
        if (i == nd - frac) {
          tmp[n++] = '.';
        }
        tmp[n++] = digits[i];
      }
    }
  }
  if (unit == PL_MILLIVOLTS) {
    tmp[n++] = 'm';
  }
  err = put(l, tmp, n);
  if (err != PL_OK) {
    return fail(l, err);
  }
  l->n++;
  return PL_OK;
}

int pl_line_end(pl_line *l) {
  static const char hex[] = "0123456789ABCDEF";
  uint16_t crc;
  char t[6];
  if (l->state != 1) {
    return l->state == 0 ? PL_ERR_STATE : fail(l, PL_ERR_STATE);
  }
  l->state = 2;
  if (l->err != PL_OK) {
    return l->err;
  }
  crc = pl_crc16(l->buf, l->len);
  t[0] = '*';
  t[1] = hex[crc >> 12];
  t[2] = hex[(crc >> 8) & 15];
  t[3] = hex[(crc >> 4) & 15];
  t[4] = hex[crc & 15];
  t[5] = '\n';
  /* The trailer's room in the line limit was kept by put; the newline
   * is outside it. */
  if ((uint32_t)l->len + 6 > l->cap) {
    return fail(l, PL_ERR_OVERFLOW);
  }
  {
    uint8_t i;
    for (i = 0; i < 6; i++) {
      l->buf[l->len + i] = t[i];
    }
  }
  l->len = (uint16_t)(l->len + 6);
  return l->len;
}
