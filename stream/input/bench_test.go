package input_test

import (
	"strings"
	"testing"

	"rivalmix/stream/input"
)

// BenchmarkDecode decodes the valid and rejected test messages, and one
// datum with 1,000 entries, reporting decodes per second and bytes per
// second. The decoder's cost must grow with the payload's length only.
func BenchmarkDecode(b *testing.B) {
	var small [][]byte
	for _, tc := range validCases() {
		small = append(small, []byte(tc.payload))
	}
	for _, tc := range rejectCases() {
		small = append(small, []byte(tc.payload))
	}
	large := []byte(`{"product":"P-1042","refit":"2026-W48","competitors":1000,"relative":[` +
		strings.Repeat("0.125,", 999) + `0.5]}`)
	opt := input.DefaultDecodeOptions()
	for _, bc := range []struct {
		name     string
		payloads [][]byte
	}{{"test-messages", small}, {"1000-entries", [][]byte{large}}} {
		b.Run(bc.name, func(b *testing.B) {
			size := 0
			for _, p := range bc.payloads {
				size += len(p)
			}
			b.SetBytes(int64(size))
			b.ReportAllocs()
			for b.Loop() {
				for _, p := range bc.payloads {
					_, _ = input.Decode(p, opt)
				}
			}
			b.ReportMetric(float64(b.N*len(bc.payloads))/b.Elapsed().Seconds(), "decodes/s")
		})
	}
}
