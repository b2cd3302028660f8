package serial

// crc16Tables holds the slicing-by-16 lookup tables of CRC-16/CCITT-FALSE
// (polynomial 0x1021, MSB first): crc16Tables[k][b] is the CRC register
// contribution of byte b followed by k zero bytes. Computed once at package
// initialisation and never written again; TestCRC16Table checks it bit by bit.
var crc16Tables = makeCRC16Tables()

func makeCRC16Tables() (t [16][256]uint16) {
	for i := 0; i < 256; i++ {
		c := uint16(i) << 8
		for j := 0; j < 8; j++ {
			if c&0x8000 != 0 {
				c = c<<1 ^ 0x1021
			} else {
				c <<= 1
			}
		}
		t[0][i] = c
	}
	for k := 1; k < 16; k++ {
		for i := 0; i < 256; i++ {
			p := t[k-1][i]
			t[k][i] = p<<8 ^ t[0][p>>8]
		}
	}
	return t
}

// crc16Update advances a CRC-16/CCITT-FALSE register over b, sixteen bytes
// at a time where it can.
func crc16Update(crc uint16, b []byte) uint16 {
	t := &crc16Tables
	for len(b) >= 16 {
		x := crc ^ (uint16(b[0])<<8 | uint16(b[1]))
		crc = t[15][x>>8] ^ t[14][x&0xFF] ^ t[13][b[2]] ^ t[12][b[3]] ^
			t[11][b[4]] ^ t[10][b[5]] ^ t[9][b[6]] ^ t[8][b[7]] ^
			t[7][b[8]] ^ t[6][b[9]] ^ t[5][b[10]] ^ t[4][b[11]] ^
			t[3][b[12]] ^ t[2][b[13]] ^ t[1][b[14]] ^ t[0][b[15]]
		b = b[16:]
	}
	for len(b) >= 8 {
		x := crc ^ (uint16(b[0])<<8 | uint16(b[1]))
		crc = t[7][x>>8] ^ t[6][x&0xFF] ^ t[5][b[2]] ^ t[4][b[3]] ^
			t[3][b[4]] ^ t[2][b[5]] ^ t[1][b[6]] ^ t[0][b[7]]
		b = b[8:]
	}
	for _, c := range b {
		crc = crc<<8 ^ t[0][byte(crc>>8)^c]
	}
	return crc
}
