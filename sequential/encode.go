package sequential

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
)

// encodingVersion is the first byte of every encoded particle system.
// Version 3 layout (little-endian; strings and byte blobs length-prefixed
// with a uvarint; counts are uvarints, floats are IEEE-754 bits):
//
//	version byte
//	resampled-since-the-last-settle byte (0 or 1; absent in version 1,
//	  which DecodeParticles still reads, taking it as 0)
//	config: aux, particles, ess fraction, resampler, sweeps, random share, refit sweeps,
//	  keep sweeps, keep ess (absent before version 3, read as 0: every
//	  Replace redraws, as those versions did)
//	prior: count a, count b, (mu, sigma) of log a, log k, log s, alpha shape, alpha rate
//	master generator (PCG MarshalBinary blob), log evidence
//	slots: count, then per slot a presence byte and, if present, id, L, n, n values
//	free slots, touched slots
//	label buffers: count, then per buffer its length and uint16 labels
//	particles: count, then per particle log weight, origin, alpha, label
//	  buffer index, segment count, per segment log a, log k, log s, size,
//	  reported, considered, then its free-segment list
//	kept-draws flag byte; if 1, per particle a count and per kept draw its
//	  log weight, alpha, segment count and thetas, label count and labels
const encodingVersion = 3

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
// generator's state, as bytes: Decode of the result continues exactly as
// the system would have. The Workers setting is not stored.
func (ps *Particles) Encode() []byte {
	e := &encoder{b: make([]byte, 0, 1024+len(ps.parts)*(len(ps.slots)*2+64))}
	e.b = append(e.b, encodingVersion)
	if ps.resampledSince {
		e.b = append(e.b, 1)
	} else {
		e.b = append(e.b, 0)
	}
	c := ps.cfg
	e.i(c.Aux)
	e.i(c.Particles)
	e.f(c.ESSFraction)
	e.i(int(c.Resampler))
	e.i(c.Sweeps)
	e.f(c.RandomShare)
	e.i(c.RefitSweeps)
	e.i(c.KeepSweeps)
	e.f(c.KeepESS)
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
	// The draws kept by the latest settle, while still valid, so that a
	// restored system reports the same posterior.
	if !ps.keptValid {
		e.b = append(e.b, 0)
		return e.b
	}
	e.b = append(e.b, 1)
	for _, k := range ps.kept {
		e.i(len(k))
		for _, d := range k {
			e.f(d.LogWeight)
			e.f(d.Alpha)
			e.i(len(d.Segments))
			for _, t := range d.Segments {
				e.f(t.LogA)
				e.f(t.LogK)
				e.f(t.LogS)
			}
			e.i(len(d.Labels))
			for _, v := range d.Labels {
				e.b = binary.LittleEndian.AppendUint16(e.b, v)
			}
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
	d := &decoder{b: b[1:]}
	resampledSince := false
	if b[0] >= 2 {
		if len(d.b) == 0 || d.b[0] > 1 {
			return nil, fmt.Errorf("%w: resampled-since-settle byte missing or not 0/1", ErrEncoding)
		}
		resampledSince = d.b[0] == 1
		d.b = d.b[1:]
	}
	const big = 1 << 30
	var c ParticleConfig
	c.Aux = d.i("aux", 1<<16)
	c.Particles = d.i("particles", 1<<16)
	c.ESSFraction = d.f("ess fraction")
	c.Resampler = Resampler(d.i("resampler", 16))
	c.Sweeps = d.i("sweeps", big)
	c.RandomShare = d.f("random share")
	c.RefitSweeps = d.i("refit sweeps", big)
	c.KeepSweeps = d.i("keep sweeps", big)
	if b[0] >= 3 {
		c.KeepESS = d.f("keep ess")
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
	ps := &Particles{cfg: c, prior: c.Prior, index: map[string]int{}, resampledSince: resampledSince}
	ps.master = rand.NewPCG(0, 0)
	if err := ps.master.UnmarshalBinary(d.bytes("generator")); err != nil && d.err == nil {
		return nil, fmt.Errorf("%w: generator: %w", ErrEncoding, err)
	}
	ps.logEvidence = d.f("log evidence")
	nslots := d.i("slots", big)
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
		n := d.i("count", l)
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
	ps.free = make([]int, d.i("free slots", nslots))
	for j := range ps.free {
		ps.free[j] = d.i("free slot", nslots-1)
	}
	ps.touched = make([]int, d.i("touched", nslots))
	for j := range ps.touched {
		s := d.i("touched slot", nslots-1)
		ps.touched[j] = s
		ps.isTouch[s] = true
	}
	bufs := make([]*labelBuf, d.i("label buffers", c.Particles))
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
	P := d.i("particles", c.Particles)
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
		st.segs = make([]segment, d.i("segments", MaxSegments))
		for k := range st.segs {
			t := Theta{LogA: d.f("log a"), LogK: d.f("log k"), LogS: d.f("log s")}
			st.segs[k].setTheta(t)
			st.segs[k].size = d.i("size", nslots)
			st.segs[k].reported = d.i("reported", big)
			st.segs[k].considered = d.i("considered", big)
		}
		st.free = make([]uint16, d.i("free segments", len(st.segs)))
		for k := range st.free {
			st.free[k] = uint16(d.i("free segment", len(st.segs)-1))
		}
		ps.parts[p] = st
	}
	if d.err != nil {
		return nil, d.err
	}
	if err := ps.decodeKept(d, c.KeepSweeps); err != nil {
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
			if (d == nil) != (c == Absent) {
				return fmt.Errorf("particle %d: slot %d presence and label disagree", p, s)
			}
			if d == nil {
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

// decodeKept reads the kept draws written after the particles.
func (ps *Particles) decodeKept(d *decoder, keep int) error {
	if len(d.b) == 0 {
		return fmt.Errorf("%w: truncated at kept-draws flag", ErrEncoding)
	}
	flag := d.b[0]
	d.b = d.b[1:]
	switch flag {
	case 0:
		return nil
	case 1:
	default:
		return fmt.Errorf("%w: kept-draws flag %d", ErrEncoding, flag)
	}
	ps.kept = make([][]Draw, len(ps.parts))
	for p := range ps.kept {
		n := d.i("kept draws", keep)
		for j := 0; j < n && d.err == nil; j++ {
			dr := Draw{LogWeight: d.f("kept weight"), Alpha: d.f("kept alpha")}
			dr.Segments = make([]Theta, d.i("kept segments", MaxSegments))
			for k := range dr.Segments {
				dr.Segments[k] = Theta{LogA: d.f("kept log a"), LogK: d.f("kept log k"), LogS: d.f("kept log s")}
			}
			nl := d.i("kept labels", ps.n)
			if d.err != nil || nl != ps.n || len(d.b) < 2*nl {
				d.fail("kept labels")
				break
			}
			dr.Labels = make([]uint16, nl)
			for k := range dr.Labels {
				dr.Labels[k] = binary.LittleEndian.Uint16(d.b[2*k:])
				if int(dr.Labels[k]) >= len(dr.Segments) {
					d.fail("kept label")
				}
			}
			d.b = d.b[2*nl:]
			ps.kept[p] = append(ps.kept[p], dr)
		}
	}
	if d.err != nil {
		return d.err
	}
	ps.keptValid = true
	return nil
}
