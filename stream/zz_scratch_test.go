package stream

import (
	"strings"
	"testing"
)

func TestZZScratch(t *testing.T) {
	opt := DefaultDecodeOptions()
	opt.MaxBytes = 2048
	for _, p := range []string{
		`{"product":"P-1","refit":"R1","competitors":10,"relative":[0.5],"colour":"red"}`,
		`{"product":"P-1","refit":"R1","competitors":"ten","relative":[0.5]}`,
		`{"product":"P-1","refit":"R1","competitors":10,"relative":[0.5,1e400]}`,
		`{"product":"P-1","refit":"R1","competitors":2,"relative":[0.5,0.4,0.3]}`,
		`{"product":"P-1","refit":"R1","own":0.5,"cross":[{"id":"P-2","value":1}]}`,
		`{"product":"P-1","refit":"R1","own":0,"cross":[{"id":"P-2","value":1}]}`,
		`not json`,
		`{"product":"P-1","refit":"R1","competitors":10,"relative":[0.5],"ids":["` + strings.Repeat("x", 3000) + `"]}`,
		`{"product":"P-1","refit":"R1","competitors":10,"relative":[NaN]}`,
	} {
		_, err := Decode([]byte(p), opt)
		t.Logf("%.60s => %v", p, err)
	}
	_, err := CategoryFromSubject("rivalmix.in.a.b", "rivalmix.in")
	t.Log(err)
}
