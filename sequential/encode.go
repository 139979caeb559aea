package sequential

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
)

// encodingVersion is the first byte of every encoded particle system.
// Version 4 layout (little-endian; strings and byte blobs length-prefixed
// with a uvarint; counts are uvarints, floats are IEEE-754 bits):
//
//	version byte
//	flags byte: 1 resampled since the last settle, 2 built
//	config: aux, particles, ess fraction, resampler, sweeps, random share,
//	  keep ess, split-merge, rao-blackwell (0 or 1), build chains, build
//	  burn, refit burn, min chains, diversity floor, renew below
//	prior: count a, count b, (mu, sigma) of log a, log k, log s, alpha shape, alpha rate
//	master generator (PCG MarshalBinary blob), log evidence, log moved
//	slots: count, then per slot a presence byte and, if present, id, L, n, n values
//	free slots, touched slots
//	label buffers: count, then per buffer its length and uint16 labels
//	particles: count, then per particle log weight, origin, alpha, label
//	  buffer index, segment count, per segment log a, log k, log s, size,
//	  reported, considered, then its free-segment list
//	placement-records flag byte; if 1, per particle a presence byte and,
//	  if present, per slot its entry count and per entry the segment and
//	  the probability (float32 bits), then the movers: count, and per
//	  mover its slot and label before the scan
//
// Versions 1 to 3 (written before the waste-free updater) still decode:
// their config held refit sweeps and keep sweeps, which are read and
// dropped, and no split-merge, recording, build or diversity settings,
// which take DefaultParticleConfig's values; their systems were built by
// adds, so they decode as built; version 1 has no resampled byte (0),
// versions before 3 no keep ess (0); their trailing kept draws are read
// and dropped (summaries then use the particles' own labels until the
// next waste-free step).
const encodingVersion = 4

// ErrEncoding reports a particle-system encoding that cannot be decoded.
var ErrEncoding = errors.New("sequential: bad particle-system encoding")

type encoder struct{ b []byte }

func (e *encoder) u(v uint64)  { e.b = binary.AppendUvarint(e.b, v) }
func (e *encoder) i(v int)     { e.u(uint64(v)) }
func (e *encoder) f(v float64) { e.b = binary.LittleEndian.AppendUint64(e.b, math.Float64bits(v)) }
func (e *encoder) s(v string)  { e.i(len(v)); e.b = append(e.b, v...) }
func (e *encoder) blob(v []byte) {
	e.i(len(v))
	e.b = append(e.b, v...)
}

// Encode returns the whole particle system, including the random
// generator's state and the placement records of the last waste-free
// step while they are valid, as bytes: Decode of the result continues
// exactly as the system would have. The Workers setting is not stored.
func (ps *Particles) Encode() []byte {
	e := &encoder{b: make([]byte, 0, 1024+len(ps.parts)*(len(ps.slots)*2+64))}
	e.b = append(e.b, encodingVersion)
	var flags byte
	if ps.resampledSince {
		flags |= 1
	}
	if ps.built {
		flags |= 2
	}
	e.b = append(e.b, flags)
	c := ps.cfg
	e.i(c.Aux)
	e.i(c.Particles)
	e.f(c.ESSFraction)
	e.i(int(c.Resampler))
	e.i(c.Sweeps)
	e.f(c.RandomShare)
	e.f(c.KeepESS)
	e.f(c.SplitMerge)
	if c.RaoBlackwell {
		e.i(1)
	} else {
		e.i(0)
	}
	e.i(c.BuildChains)
	e.i(c.BuildBurn)
	e.i(c.RefitBurn)
	e.i(c.MinChains)
	e.f(c.DiversityFloor)
	e.f(c.RenewBelow)
	pr := ps.prior
	for _, v := range []float64{pr.CountA, pr.CountB, pr.LogA.Mu, pr.LogA.Sigma, pr.LogK.Mu, pr.LogK.Sigma,
		pr.LogS.Mu, pr.LogS.Sigma, pr.AlphaShape, pr.AlphaRate} {
		e.f(v)
	}
	m, err := ps.master.MarshalBinary()
	if err != nil {
		panic("sequential: PCG marshal: " + err.Error()) // PCG never fails
	}
	e.blob(m)
	e.f(ps.logEvidence)
	e.f(ps.logMoved)
	e.i(len(ps.slots))
	for s, d := range ps.slots {
		if d == nil {
			e.b = append(e.b, 0)
			continue
		}
		e.b = append(e.b, 1)
		e.s(ps.ids[s])
		e.i(d.L())
		e.i(d.N())
		for _, v := range d.values {
			e.f(v)
		}
	}
	e.i(len(ps.free))
	for _, s := range ps.free {
		e.i(s)
	}
	e.i(len(ps.touched))
	for _, s := range ps.touched {
		e.i(s)
	}

	// Label buffers shared by several particles are written once.
	bufIndex := map[*labelBuf]int{}
	var bufs []*labelBuf
	for _, st := range ps.parts {
		if _, ok := bufIndex[st.labels]; !ok {
			bufIndex[st.labels] = len(bufs)
			bufs = append(bufs, st.labels)
		}
	}
	e.i(len(bufs))
	for _, lb := range bufs {
		e.i(len(lb.l))
		for _, v := range lb.l {
			e.b = binary.LittleEndian.AppendUint16(e.b, v)
		}
	}
	e.i(len(ps.parts))
	for p, st := range ps.parts {
		e.f(ps.logw[p])
		e.i(ps.origin[p])
		e.f(st.alpha)
		e.i(bufIndex[st.labels])
		e.i(len(st.segs))
		for _, g := range st.segs {
			e.f(g.theta.LogA)
			e.f(g.theta.LogK)
			e.f(g.theta.LogS)
			e.i(g.size)
			e.i(g.reported)
			e.i(g.considered)
		}
		e.i(len(st.free))
		for _, c := range st.free {
			e.i(int(c))
		}
	}
	if ps.soft == nil {
		e.b = append(e.b, 0)
		return e.b
	}
	e.b = append(e.b, 1)
	for _, sf := range ps.soft {
		if sf == nil {
			e.b = append(e.b, 0)
			continue
		}
		e.b = append(e.b, 1)
		for i := 0; i+1 < len(sf.Off); i++ {
			seg, p := sf.entries(i)
			e.i(len(seg))
			for k, c := range seg {
				e.i(int(c))
				e.b = binary.LittleEndian.AppendUint32(e.b, math.Float32bits(p[k]))
			}
		}
		e.i(len(sf.Movers))
		for _, m := range sf.Movers {
			e.i(int(m.Product))
			e.i(int(m.From))
		}
	}
	return e.b
}

type decoder struct {
	b   []byte
	err error
}

func (d *decoder) fail(what string) {
	if d.err == nil {
		d.err = fmt.Errorf("%w: truncated or corrupt at %s", ErrEncoding, what)
	}
}

func (d *decoder) u(what string) uint64 {
	if d.err != nil {
		return 0
	}
	v, n := binary.Uvarint(d.b)
	if n <= 0 {
		d.fail(what)
		return 0
	}
	d.b = d.b[n:]
	return v
}

// i reads a count no larger than limit.
func (d *decoder) i(what string, limit int) int {
	v := d.u(what)
	if v > uint64(limit) {
		d.fail(what)
		return 0
	}
	return int(v)
}

// n reads a count of items that each take at least size bytes further on,
// no larger than limit: a count the remaining bytes cannot hold is
// refused before anything is allocated for it.
func (d *decoder) n(what string, limit, size int) int {
	return d.i(what, min(limit, len(d.b)/size))
}

// flag reads a byte that must be 0 (absent) or 1 (present).
func (d *decoder) flag(what string) (bool, error) {
	if len(d.b) == 0 {
		return false, fmt.Errorf("%w: truncated at %s", ErrEncoding, what)
	}
	v := d.b[0]
	d.b = d.b[1:]
	if v > 1 {
		return false, fmt.Errorf("%w: %s %d", ErrEncoding, what, v)
	}
	return v == 1, nil
}

func (d *decoder) f(what string) float64 {
	if d.err != nil {
		return 0
	}
	if len(d.b) < 8 {
		d.fail(what)
		return 0
	}
	v := math.Float64frombits(binary.LittleEndian.Uint64(d.b))
	d.b = d.b[8:]
	return v
}

func (d *decoder) bytes(what string) []byte {
	v64 := d.u(what)
	if d.err != nil {
		return nil
	}
	// The limit is what is left after the length prefix itself.
	if v64 > uint64(len(d.b)) {
		d.fail(what)
		return nil
	}
	n := int(v64)
	v := d.b[:n]
	d.b = d.b[n:]
	return v
}

// DecodeParticles rebuilds a particle system from Encode's bytes; workers
// sets the goroutines used from then on (0 = GOMAXPROCS). Errors wrap
// ErrEncoding.
func DecodeParticles(b []byte, workers int) (*Particles, error) {
	if len(b) == 0 {
		return nil, fmt.Errorf("%w: empty", ErrEncoding)
	}
	if b[0] < 1 || b[0] > encodingVersion {
		return nil, fmt.Errorf("%w: version %d, want 1 to %d", ErrEncoding, b[0], encodingVersion)
	}
	version := b[0]
	d := &decoder{b: b[1:]}
	resampledSince, built := false, true
	switch {
	case version >= 4:
		if len(d.b) == 0 || d.b[0] > 3 {
			return nil, fmt.Errorf("%w: flags byte missing or unknown", ErrEncoding)
		}
		resampledSince, built = d.b[0]&1 != 0, d.b[0]&2 != 0
		d.b = d.b[1:]
	case version >= 2:
		if len(d.b) == 0 || d.b[0] > 1 {
			return nil, fmt.Errorf("%w: resampled-since-settle byte missing or not 0/1", ErrEncoding)
		}
		resampledSince = d.b[0] == 1
		d.b = d.b[1:]
	}
	const big = 1 << 30
	c := DefaultParticleConfig()
	c.Aux = d.i("aux", 1<<16)
	c.Particles = d.i("particles", 1<<16)
	c.ESSFraction = d.f("ess fraction")
	c.Resampler = Resampler(d.i("resampler", 16))
	c.Sweeps = d.i("sweeps", big)
	c.RandomShare = d.f("random share")
	c.KeepESS = 0
	if version < 4 {
		d.i("refit sweeps", big)
		d.i("keep sweeps", big)
	}
	if version >= 3 {
		c.KeepESS = d.f("keep ess")
	}
	if version >= 4 {
		c.SplitMerge = d.f("split-merge")
		c.RaoBlackwell = d.i("rao-blackwell", 1) == 1
		c.BuildChains = d.i("build chains", 1<<16)
		c.BuildBurn = d.i("build burn", big)
		c.RefitBurn = d.i("refit burn", big)
		c.MinChains = d.i("min chains", 1<<16)
		c.DiversityFloor = d.f("diversity floor")
		c.RenewBelow = d.f("renew below")
	}
	c.Workers = workers
	pr := &c.Prior
	for _, p := range []*float64{&pr.CountA, &pr.CountB, &pr.LogA.Mu, &pr.LogA.Sigma, &pr.LogK.Mu, &pr.LogK.Sigma,
		&pr.LogS.Mu, &pr.LogS.Sigma, &pr.AlphaShape, &pr.AlphaRate} {
		*p = d.f("prior")
	}
	if d.err != nil {
		return nil, d.err
	}
	if err := c.Validate(); err != nil {
		return nil, fmt.Errorf("%w: %w", ErrEncoding, err)
	}
	ps := &Particles{cfg: c, prior: c.Prior, index: map[string]int{}, resampledSince: resampledSince, built: built}
	ps.master = rand.NewPCG(0, 0)
	if err := ps.master.UnmarshalBinary(d.bytes("generator")); err != nil && d.err == nil {
		return nil, fmt.Errorf("%w: generator: %w", ErrEncoding, err)
	}
	ps.logEvidence = d.f("log evidence")
	if version >= 4 {
		ps.logMoved = d.f("log moved")
	}
	nslots := d.n("slots", big, 1)
	if d.err != nil {
		return nil, d.err
	}
	ps.slots = make([]*Datum, nslots)
	ps.ids = make([]string, nslots)
	ps.isTouch = make([]bool, nslots)
	for s := 0; s < nslots && d.err == nil; s++ {
		if len(d.b) == 0 {
			d.fail("slot")
			break
		}
		present := d.b[0]
		d.b = d.b[1:]
		if present == 0 {
			continue
		}
		id := string(d.bytes("product id"))
		l := d.i("competitors", MaxCompetitors)
		n := d.n("count", l, 8)
		vals := make([]float64, n)
		for j := range vals {
			vals[j] = d.f("value")
		}
		if d.err != nil {
			break
		}
		dt, err := NewDatum(vals, l)
		if err != nil {
			return nil, fmt.Errorf("%w: product %q: %w", ErrEncoding, id, err)
		}
		if _, dup := ps.index[id]; dup {
			return nil, fmt.Errorf("%w: product %q twice", ErrEncoding, id)
		}
		ps.slots[s] = &dt
		ps.ids[s] = id
		ps.index[id] = s
		ps.n++
	}
	ps.free = make([]int, d.n("free slots", nslots, 1))
	for j := range ps.free {
		ps.free[j] = d.i("free slot", nslots-1)
	}
	ps.touched = make([]int, d.n("touched", nslots, 1))
	for j := range ps.touched {
		s := d.i("touched slot", nslots-1)
		ps.touched[j] = s
		ps.isTouch[s] = true
	}
	bufs := make([]*labelBuf, d.n("label buffers", c.Particles, 1))
	for j := range bufs {
		n := d.i("labels", nslots)
		if d.err != nil || len(d.b) < 2*n {
			d.fail("labels")
			break
		}
		lb := &labelBuf{l: make([]uint16, n)}
		for k := range lb.l {
			lb.l[k] = binary.LittleEndian.Uint16(d.b[2*k:])
		}
		d.b = d.b[2*n:]
		bufs[j] = lb
	}
	P := d.n("particles", c.Particles, 20)
	if d.err != nil {
		return nil, d.err
	}
	if P != c.Particles {
		return nil, fmt.Errorf("%w: %d particles stored, config says %d", ErrEncoding, P, c.Particles)
	}
	ps.parts = make([]*State, P)
	ps.logw = make([]float64, P)
	ps.origin = make([]int, P)
	for p := 0; p < P && d.err == nil; p++ {
		ps.logw[p] = d.f("log weight")
		ps.origin[p] = d.i("origin", P-1)
		st := &State{data: ps.slots, prior: &ps.prior, m: c.Aux, n: ps.n}
		st.alpha = d.f("alpha")
		if len(bufs) == 0 {
			d.fail("label buffers")
			break
		}
		bi := d.i("label buffer index", len(bufs)-1)
		if d.err != nil {
			break
		}
		st.labels = bufs[bi]
		st.labels.refs.Add(1)
		st.segs = make([]segment, d.n("segments", MaxSegments, 27))
		for k := range st.segs {
			t := Theta{LogA: d.f("log a"), LogK: d.f("log k"), LogS: d.f("log s")}
			st.segs[k].setTheta(t)
			st.segs[k].size = d.i("size", nslots)
			st.segs[k].reported = d.i("reported", big)
			st.segs[k].considered = d.i("considered", big)
		}
		st.free = make([]uint16, d.n("free segments", len(st.segs), 1))
		for k := range st.free {
			st.free[k] = uint16(d.i("free segment", len(st.segs)-1))
		}
		ps.parts[p] = st
	}
	if d.err != nil {
		return nil, d.err
	}
	if version >= 4 {
		if err := ps.decodeSoft(d); err != nil {
			return nil, err
		}
	} else if err := skipKept(d, len(ps.parts), ps.n); err != nil {
		return nil, err
	}
	if len(d.b) != 0 {
		return nil, fmt.Errorf("%w: %d trailing bytes", ErrEncoding, len(d.b))
	}
	if err := ps.check(); err != nil {
		return nil, fmt.Errorf("%w: %w", ErrEncoding, err)
	}
	ps.initScratch()
	return ps, nil
}

// check verifies that every particle's labels and segment totals agree
// with the data: the invariant every operation keeps.
func (ps *Particles) check() error {
	seenFree := make([]bool, len(ps.slots))
	for _, s := range ps.free {
		if ps.slots[s] != nil || seenFree[s] {
			return fmt.Errorf("free slot %d holds a product or is listed twice", s)
		}
		seenFree[s] = true
	}
	for s, d := range ps.slots {
		if d == nil && !seenFree[s] {
			return fmt.Errorf("slot %d is empty but not on the free list", s)
		}
	}
	for _, s := range ps.touched {
		if ps.slots[s] == nil {
			return fmt.Errorf("touched slot %d holds no product", s)
		}
	}
	if math.IsNaN(ps.logEvidence) {
		return errors.New("log evidence is NaN")
	}
	for p, lw := range ps.logw {
		if math.IsNaN(lw) || math.IsInf(lw, 0) {
			return fmt.Errorf("particle %d: log weight %v", p, lw)
		}
	}
	for p, st := range ps.parts {
		seenSeg := make([]bool, len(st.segs))
		for _, c := range st.free {
			if seenSeg[c] {
				return fmt.Errorf("particle %d: free segment %d listed twice", p, c)
			}
			seenSeg[c] = true
		}
		for c, g := range st.segs {
			t := g.theta
			if g.size > 0 && (!finite(t.LogA) || !finite(t.LogK) || !finite(t.LogS)) {
				return fmt.Errorf("particle %d: segment %d parameters not finite", p, c)
			}
			if (g.size == 0) != seenSeg[c] {
				return fmt.Errorf("particle %d: segment %d: free list and size disagree", p, c)
			}
		}
		if len(st.labels.l) != len(ps.slots) {
			return fmt.Errorf("particle %d: %d labels for %d slots", p, len(st.labels.l), len(ps.slots))
		}
		size := make([]int, len(st.segs))
		rep := make([]int, len(st.segs))
		con := make([]int, len(st.segs))
		for s, c := range st.labels.l {
			d := ps.slots[s]
			if !ps.built && c != Absent {
				return fmt.Errorf("particle %d: slot %d labelled before the first build", p, s)
			}
			if ps.built && (d == nil) != (c == Absent) {
				return fmt.Errorf("particle %d: slot %d presence and label disagree", p, s)
			}
			if c == Absent {
				continue
			}
			if int(c) >= len(st.segs) {
				return fmt.Errorf("particle %d: slot %d label %d out of range", p, s, c)
			}
			size[c]++
			rep[c] += d.N()
			con[c] += d.L()
		}
		for c, g := range st.segs {
			if g.size != size[c] || g.reported != rep[c] || g.considered != con[c] {
				return fmt.Errorf("particle %d: segment %d totals disagree with its members", p, c)
			}
		}
		if !(st.alpha > 0) || math.IsInf(st.alpha, 0) {
			return fmt.Errorf("particle %d: alpha %v", p, st.alpha)
		}
	}
	return nil
}

// skipKept reads and drops the kept draws that versions 1 to 3 wrote
// after the particles (P particles, n present products).
func skipKept(d *decoder, P, n int) error {
	if present, err := d.flag("kept-draws flag"); !present || err != nil {
		return err
	}
	for p := 0; p < P && d.err == nil; p++ {
		k := d.n("kept draws", 1<<16, 18)
		for j := 0; j < k && d.err == nil; j++ {
			d.f("kept weight")
			d.f("kept alpha")
			segs := d.n("kept segments", MaxSegments, 24)
			for x := 0; x < 3*segs; x++ {
				d.f("kept theta")
			}
			nl := d.i("kept labels", n)
			if d.err != nil || nl != n || len(d.b) < 2*nl {
				d.fail("kept labels")
				break
			}
			for x := 0; x < nl; x++ {
				if int(binary.LittleEndian.Uint16(d.b[2*x:])) >= segs {
					d.fail("kept label")
				}
			}
			d.b = d.b[2*nl:]
		}
	}
	return d.err
}

// decodeSoft reads the placement records written after the particles.
func (ps *Particles) decodeSoft(d *decoder) error {
	if present, err := d.flag("placement-records flag"); !present || err != nil {
		return err
	}
	ps.soft = make([]*Soft, len(ps.parts))
	for p := range ps.soft {
		if d.err != nil {
			break
		}
		if len(d.b) == 0 || d.b[0] > 1 {
			d.fail("placement record presence")
			break
		}
		present := d.b[0] == 1
		d.b = d.b[1:]
		if !present {
			continue
		}
		sf := &Soft{Off: make([]uint32, 1, len(ps.slots)+1)}
		nseg := len(ps.parts[p].segs)
		for i := 0; i < len(ps.slots) && d.err == nil; i++ {
			k := d.n("placement entries", nseg, 5)
			for x := 0; x < k && d.err == nil; x++ {
				c := d.i("placement segment", nseg-1)
				if len(d.b) < 4 {
					d.fail("placement probability")
					break
				}
				pr := math.Float32frombits(binary.LittleEndian.Uint32(d.b))
				d.b = d.b[4:]
				if !(pr >= 0 && pr <= 1) {
					d.fail("placement probability")
				}
				sf.Seg = append(sf.Seg, uint16(c))
				sf.P = append(sf.P, pr)
			}
			sf.Off = append(sf.Off, uint32(len(sf.Seg)))
		}
		nm := d.n("movers", len(ps.slots), 2)
		last := -1
		for x := 0; x < nm && d.err == nil; x++ {
			i := d.i("mover slot", len(ps.slots)-1)
			from := d.i("mover label", nseg-1)
			if i <= last || ps.slots[i] == nil {
				d.fail("mover slot")
			}
			last = i
			sf.Movers = append(sf.Movers, Mover{Product: uint32(i), From: uint16(from)})
		}
		ps.soft[p] = sf
	}
	return d.err
}
