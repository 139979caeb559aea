package input_test

import (
	"encoding/json"
	"errors"
	"math"
	"testing"

	"rivalmix/stream/input"
)

// FuzzDecode checks that Decode never panics, that every accepted datum
// keeps the invariants the model relies on, and that the hash survives a
// round trip through the canonical relative form.
func FuzzDecode(f *testing.F) {
	for _, tc := range validCases() {
		f.Add([]byte(tc.payload))
	}
	for _, tc := range rejectCases() {
		f.Add([]byte(tc.payload))
	}
	lenient := input.DefaultDecodeOptions()
	strict := lenient
	strict.Strict = true
	f.Fuzz(func(t *testing.T, payload []byte) {
		m, err := input.Decode(payload, lenient)
		sm, serr := input.Decode(payload, strict)
		if err != nil {
			var ie *input.InputError
			if !errors.As(err, &ie) || !errors.Is(err, input.ErrInvalidInput) {
				t.Fatalf("error %v (%T) is not an *InputError", err, err)
			}
			if serr == nil {
				t.Fatalf("strict mode accepted what the default mode rejected: %v", err)
			}
			return
		}
		checkInvariants(t, m)
		switch {
		case serr == nil && sm.Hash != m.Hash:
			t.Fatalf("strict and default modes disagree on the hash")
		case serr == nil && len(m.Dropped) > 0:
			t.Fatalf("strict mode accepted a datum with non-positive entries %+v", m.Dropped)
		case serr != nil && len(m.Dropped) == 0:
			t.Fatalf("strict mode rejected a datum with nothing to drop: %v", serr)
		}

		again := encodeCanonical(t, m)
		// The canonical form spells every number with 17 significant
		// digits, so it may be longer than the payload it came from.
		m2, err := input.Decode(again, input.DecodeOptions{MaxBytes: 1 << 20})
		if err != nil {
			t.Fatalf("re-encoded message %s does not decode: %v", again, err)
		}
		if m2.Hash != m.Hash {
			t.Fatalf("hash changed after re-encoding as %s", again)
		}
	})
}

func checkInvariants(t *testing.T, m input.Message) {
	t.Helper()
	switch m.Kind {
	case input.KindRefitComplete, input.KindWithdrawn:
		if m.Relative != nil || m.IDs != nil || m.Dropped != nil || m.Competitors != 0 {
			t.Fatalf("control message carries datum fields: %+v", m)
		}
		return
	case input.KindDatum:
	default:
		t.Fatalf("unknown kind %v", m.Kind)
	}
	if m.Product == "" || m.Refit == "" {
		t.Fatalf("datum without product or refit: %+v", m)
	}
	if m.Competitors < 1 || m.Competitors > 1000 {
		t.Fatalf("Competitors = %d, want 1..1000", m.Competitors)
	}
	if m.Relative == nil {
		t.Fatalf("Relative is nil for a datum")
	}
	if n := len(m.Relative) + len(m.Dropped); n > m.Competitors {
		t.Fatalf("%d entries > %d competitors", n, m.Competitors)
	}
	for i, v := range m.Relative {
		if !(v > 0) || math.IsInf(v, 0) {
			t.Fatalf("Relative[%d] = %g, want positive and finite", i, v)
		}
		if i > 0 && v > m.Relative[i-1] {
			t.Fatalf("Relative not sorted descending: %v", m.Relative)
		}
	}
	if m.IDs != nil && len(m.IDs) != len(m.Relative) {
		t.Fatalf("%d ids for %d values", len(m.IDs), len(m.Relative))
	}
	for i, d := range m.Dropped {
		if !(d.Value <= 0) || math.Signbit(d.Value) && d.Value == 0 {
			t.Fatalf("Dropped[%d] = %g, want <= 0 and not -0", i, d.Value)
		}
		if i > 0 && d.Value > m.Dropped[i-1].Value {
			t.Fatalf("Dropped not sorted descending: %+v", m.Dropped)
		}
	}
	if m.Own > 0 || math.IsInf(m.Own, 0) || math.IsNaN(m.Own) {
		t.Fatalf("Own = %g, want negative or 0", m.Own)
	}
}

// encodeCanonical writes m back as JSON: a datum in the relative form,
// with its dropped entries put back into the list.
func encodeCanonical(t *testing.T, m input.Message) []byte {
	t.Helper()
	var v any
	switch m.Kind {
	case input.KindRefitComplete:
		v = struct {
			Refit    string `json:"refit"`
			Complete bool   `json:"complete"`
			Expected int    `json:"expected"`
		}{m.Refit, true, m.Expected}
	case input.KindWithdrawn:
		v = struct {
			Product   string `json:"product"`
			Refit     string `json:"refit,omitempty"`
			Withdrawn bool   `json:"withdrawn"`
		}{m.Product, m.Refit, true}
	default:
		rel := append([]float64{}, m.Relative...)
		var ids []string
		if m.IDs != nil {
			ids = append([]string{}, m.IDs...)
		}
		for _, d := range m.Dropped {
			rel = append(rel, d.Value)
			if ids != nil {
				ids = append(ids, d.ID)
			}
		}
		v = struct {
			Product     string    `json:"product"`
			Refit       string    `json:"refit"`
			Competitors int       `json:"competitors"`
			Relative    []float64 `json:"relative"`
			IDs         []string  `json:"ids,omitempty"`
		}{m.Product, m.Refit, m.Competitors, rel, ids}
	}
	b, err := json.Marshal(v)
	if err != nil {
		t.Fatalf("re-encoding %+v: %v", m, err)
	}
	return b
}
