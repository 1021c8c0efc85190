package bridge

import "hash/crc32"

// castagnoli is the CRC-32C table (polynomial 0x1EDC6F41, reflected
// 0x82F63B78), the CRC of iSCSI (RFC 3720, section 12.1).
var castagnoli = crc32.MakeTable(crc32.Castagnoli)

// Checksum returns the CRC-32C of b: width 32, polynomial 0x1EDC6F41,
// initial value and final XOR 0xFFFFFFFF, input and output reflected
// (CRC-32/ISCSI in Greg Cook's "Catalogue of parametrised CRC algorithms",
// check value 0xE3069283 for the ASCII string "123456789").
func Checksum(b []byte) uint32 { return crc32.Checksum(b, castagnoli) }
