package alerts

import (
	"encoding/json"
	"math"
	"testing"
)

func TestFloatJSON(t *testing.T) {
	t.Parallel()
	type body struct {
		A Float `json:"a"`
		B Float `json:"b,omitzero"`
	}
	for _, tc := range []struct {
		in   body
		want string
	}{
		{body{0.25, 1.5}, `{"a":0.25,"b":1.5}`},
		{body{0, 0}, `{"a":0,"b":0}`},
		{body{Float(math.NaN()), Float(math.NaN())}, `{"a":null}`},
		{body{Float(math.Inf(1)), Float(math.Inf(-1))}, `{"a":null}`},
	} {
		got, err := json.Marshal(tc.in)
		if err != nil {
			t.Fatal(err)
		}
		if string(got) != tc.want {
			t.Errorf("Marshal(%v) = %s, want %s", tc.in, got, tc.want)
		}
	}
	var back body
	if err := json.Unmarshal([]byte(`{"a":null,"b":-2e-3}`), &back); err != nil {
		t.Fatal(err)
	}
	if back.A.Defined() || back.B != -2e-3 {
		t.Errorf("Unmarshal gave %v, want NaN and -0.002", back)
	}
	if err := json.Unmarshal([]byte(`{"a":"x"}`), &back); err == nil {
		t.Error("a string decoded as a Float")
	}
}
