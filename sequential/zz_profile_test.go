package sequential_test

import (
	"math/rand/v2"
	"os"
	"strconv"
	"testing"
	"time"

	"rivalmix/sequential"
	"rivalmix/sequential/synth"
)

func TestZZPhases(t *testing.T) {
	for _, layout := range []synth.Layout{synth.Separated, synth.Overlapping} {
		for _, drift := range []float64{0, 0.1} {
			src := rand.New(rand.NewPCG(8, uint64(layout)))
			cfg := synth.RandomConfig(300, layout, src)
			seq := synth.NewSequence(cfg, 8, 0, src)
			seq.Drift = drift
			pc := sequential.DefaultParticleConfig()
			pc.Workers = 1
			pc.Particles = envInt("ZZ_P", pc.Particles)
			pc.MinChains = envInt("ZZ_M", pc.MinChains)
			pc.RefitBurn = envInt("ZZ_BURN", pc.RefitBurn)
			ps, _ := sequential.NewParticles(pc, 1, 2)
			opt := sequential.DefaultSummaryOptions()
			opt.Workers = 1
			var tRep, tEnd, tSum, tB, tBS time.Duration
			for r := 0; r < 8; r++ {
				products := seq.Refit(r)
				s := time.Now()
				for i := range products {
					if ps.Has(products[i].ID) {
						ps.Replace(products[i].ID, products[i].Datum())
					} else {
						ps.Add(products[i].ID, products[i].Datum())
					}
					if ps.Pending() >= 256 {
						ps.Settle()
					}
				}
				tRep += time.Since(s)
				s = time.Now()
				ps.SettleRefit()
				tEnd += time.Since(s)
				s = time.Now()
				ps.Summary(opt)
				tSum += time.Since(s)
				data := dataOf(products)
				s = time.Now()
				gsrc := rand.New(rand.NewPCG(uint64(r), 3))
				g, _ := sequential.NewGibbs(data, sequential.DefaultGibbsConfig(), gsrc)
				d := g.Run(gsrc, nil)
				tB += time.Since(s)
				s = time.Now()
				sequential.Summarize(d, data, opt)
				tBS += time.Since(s)
			}
			var gp agreement
			spread := 0.0
			if os.Getenv("ZZ_AGREE") != "" {
				data := ps.Data()
				pool, sp := harnessReference(t, data, referenceSweeps, 51)
				spread = sp
				gp = agreementOf(factsOf(ps.Draws(), data), factsOf(pool, data))
			}
			t.Logf("agreement %+v spread %.3f meets %v", gp, spread, gp.meetsWith(spread))
			t.Logf("%v drift %v: replace %v end %v summary %v | batch run %v summary %v | ratio %.3f", layout, drift, tRep, tEnd, tSum, tB, tBS,
				(tRep+tEnd+tSum).Seconds()/(tB+tBS).Seconds())
		}
	}
}

func envInt(k string, d int) int {
	if v, err := strconv.Atoi(os.Getenv(k)); err == nil {
		return v
	}
	return d
}
