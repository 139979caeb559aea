package sequential

import (
	"bufio"
	"encoding/json"
	"math"
	"math/rand/v2"
	"os"
	"testing"
)

func TestS2Tmp(t *testing.T) {
	f, _ := os.Open("../testdata/larkfield-cereal.jsonl")
	sc := bufio.NewScanner(f)
	var data []*Datum
	for sc.Scan() {
		var m struct {
			Competitors int       `json:"competitors"`
			Relative    []float64 `json:"relative"`
		}
		if json.Unmarshal(sc.Bytes(), &m) != nil || m.Competitors == 0 {
			continue
		}
		d := MustDatum(m.Relative, m.Competitors)
		data = append(data, &d)
	}
	src := rand.New(rand.NewPCG(1, 2))
	g, err := NewGibbs(data, DefaultGibbsConfig(), src)
	if err != nil {
		t.Fatal(err)
	}
	for sw := 0; sw < 1500; sw++ {
		g.Sweep(src)
		if sw%50 == 0 || sw > 1400 && sw%10 == 0 {
			st := g.st
			line := ""
			for c := range st.segs {
				s := st.segs[c]
				if s.size < 20 {
					continue
				}
				ew := s.theta.EW()
				med := newOrderMedians().of(ew, 10)
				line += " | " + ftoa(float64(s.size)) + " a=" + ftoa(ew.A) + " k=" + ftoa(ew.K) + " s=" + ftoa(ew.S) + " rep=" + ftoa(float64(s.reported)/float64(s.size)) + " med1=" + ftoa(med[0])
			}
			t.Logf("sweep %d%s", sw, line)
		}
	}
}

func ftoa(x float64) string {
	if math.Abs(x) > 1000 {
		return "BIG" + string(rune('0'+int(math.Log10(x))%10))
	}
	return string([]byte(func() string { return fmtG(x) }()))
}

func fmtG(x float64) string {
	b, _ := json.Marshal(math.Round(x*1000) / 1000)
	return string(b)
}
