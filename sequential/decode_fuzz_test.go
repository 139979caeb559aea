package sequential_test

import (
	"bytes"
	"errors"
	"testing"

	"rivalmix/sequential"
)

// FuzzDecodeParticlesRoundTrip: DecodeParticles reads a category's
// snapshot from the state file, so damaged bytes must give an error
// wrapping ErrEncoding, never a panic (FuzzDecodeParticles checks that
// much); bytes it accepts must re-encode to an encoding that decodes
// again and is then stable.
func FuzzDecodeParticlesRoundTrip(f *testing.F) {
	for _, seed := range fuzzParticleSeeds(f) {
		f.Add(seed)
	}
	f.Fuzz(func(t *testing.T, b []byte) {
		ps, err := sequential.DecodeParticles(b, 1)
		if err != nil {
			if !errors.Is(err, sequential.ErrEncoding) {
				t.Fatalf("error %v does not wrap ErrEncoding", err)
			}
			return
		}
		if ps.Len() != len(ps.Products()) || ps.ESS() < 0 {
			t.Fatalf("decoded system: %d products but %d ids, ESS %v", ps.Len(), len(ps.Products()), ps.ESS())
		}
		again := ps.Encode()
		ps2, err := sequential.DecodeParticles(again, 1)
		if err != nil {
			t.Fatalf("re-encoded system does not decode: %v", err)
		}
		if !bytes.Equal(ps2.Encode(), again) {
			t.Fatal("encoding changes on a second round trip")
		}
	})
}

// fuzzParticleSeeds encodes small particle systems: empty, after adds,
// after a settle, and after a removal, plus a truncated one.
func fuzzParticleSeeds(f *testing.F) [][]byte {
	f.Helper()
	cfg := sequential.DefaultParticleConfig()
	cfg.Particles = 4
	cfg.Workers = 1
	ps, err := sequential.NewParticles(cfg, 7, 11)
	if err != nil {
		f.Fatal(err)
	}
	seeds := [][]byte{ps.Encode()}
	data := [][]float64{{0.9, 0.5, 0.3}, {0.4}, {}, {0.7, 0.65}}
	for i, v := range data {
		d, err := sequential.NewDatum(v, 10)
		if err != nil {
			f.Fatal(err)
		}
		if _, err := ps.Add("P-10"+string(rune('1'+i)), d); err != nil {
			f.Fatal(err)
		}
	}
	seeds = append(seeds, ps.Encode())
	ps.Settle()
	seeds = append(seeds, ps.Encode())
	if err := ps.Remove("P-102"); err != nil {
		f.Fatal(err)
	}
	full := ps.Encode()
	return append(seeds, full, full[:len(full)/2])
}
