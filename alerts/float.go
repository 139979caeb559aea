package alerts

import (
	"bytes"
	"encoding/json"
	"fmt"
	"math"
)

// Float is a number that may be undefined (NaN or infinite), such as the
// mean surprise of a refit that changed no datum or the median of a third
// competitor that no member reports. It is the project's one rule for such
// numbers in JSON, for events and read API alike: an undefined Float
// encodes as null, or is left out when its field is tagged omitzero, and
// null decodes back to NaN.
type Float float64

// Defined reports whether f is a finite number.
func (f Float) Defined() bool {
	v := float64(f)
	return !math.IsNaN(v) && !math.IsInf(v, 0)
}

// IsZero reports whether f is undefined, so that encoding/json leaves out
// a field tagged omitzero exactly when it would write null. A defined 0 is
// written.
func (f Float) IsZero() bool { return !f.Defined() }

// MarshalJSON writes the number as encoding/json writes a float64, or null
// when it is undefined.
func (f Float) MarshalJSON() ([]byte, error) {
	if !f.Defined() {
		return []byte("null"), nil
	}
	return json.Marshal(float64(f))
}

// UnmarshalJSON reads a number, or null as NaN.
func (f *Float) UnmarshalJSON(b []byte) error {
	if bytes.Equal(b, []byte("null")) {
		*f = Float(math.NaN())
		return nil
	}
	var v float64
	if err := json.Unmarshal(b, &v); err != nil {
		return fmt.Errorf("alerts: Float: %w", err)
	}
	*f = Float(v)
	return nil
}
