package input

import (
	"crypto/sha256"
	"encoding/binary"
	"math"
)

// hashDomain starts every hashed encoding. Hashes are stored to recognise
// redelivered messages, so changing the canonical form below must come
// with a new domain string.
const hashDomain = "rivalmix/input/v1\x00"

// contentHash hashes a length-prefixed binary encoding of the message's
// content, so that no two different contents share an encoding.
func contentHash(m *Message) [32]byte {
	b := make([]byte, 0, 64+len(m.Product)+len(m.Refit)+16*(len(m.Relative)+len(m.Dropped)))
	b = append(b, hashDomain...)
	b = binary.AppendUvarint(b, uint64(m.Kind))
	b = appendString(b, m.Product)
	b = appendString(b, m.Refit)
	switch m.Kind {
	case KindDatum:
		b = binary.AppendUvarint(b, uint64(m.Competitors))
		b = binary.AppendUvarint(b, uint64(len(m.Relative)))
		for _, v := range m.Relative {
			b = binary.BigEndian.AppendUint64(b, math.Float64bits(v))
		}
		b = binary.AppendUvarint(b, uint64(len(m.IDs)))
		for _, id := range m.IDs {
			b = appendString(b, id)
		}
		b = binary.AppendUvarint(b, uint64(len(m.Dropped)))
		for _, d := range m.Dropped {
			b = appendString(b, d.ID)
			b = binary.BigEndian.AppendUint64(b, math.Float64bits(d.Value))
		}
	case KindRefitComplete:
		b = binary.AppendUvarint(b, uint64(m.Expected))
	}
	return sha256.Sum256(b)
}

func appendString(b []byte, s string) []byte {
	b = binary.AppendUvarint(b, uint64(len(s)))
	return append(b, s...)
}
