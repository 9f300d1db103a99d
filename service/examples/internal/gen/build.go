// Package gen generates the large example model of package examples,
// tarnwick-regions: the whole platform of Tarnwick Freight (an invented
// parcel carrier) across three regions, down to every host, with the alarms
// that watch it. The scenario and every number in it are made up.
//
// Generation is deterministic: the same code gives the same bytes on every
// machine. Probabilities are whole parts per million turned into float64 by
// one division (correctly rounded everywhere), placement choices come from
// a fixed-seed splitmix64 stream, and no transcendental function or
// floating-point sum is involved.
//
// Regenerate the shipped file after changing this package:
//
//	go generate ./service/examples
package gen

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"

	"github.com/beliefd/beliefd/service/model"
)

// million is one in parts per million.
const million = 1_000_000

// pr turns parts per million into a probability.
func pr(ppm int) float64 { return float64(ppm) / million }

// dist turns parts per million into a distribution; they must add up to a
// million.
func dist(ppm ...int) ([]float64, error) {
	out := make([]float64, len(ppm))
	sum := 0
	for i, k := range ppm {
		if k < 0 || k > million {
			return nil, fmt.Errorf("%d ppm is outside [0, %d]", k, million)
		}
		sum += k
		out[i] = pr(k)
	}
	if sum != million {
		return nil, fmt.Errorf("distribution %v adds up to %d ppm, not %d", ppm, sum, million)
	}
	return out, nil
}

// Common state lists.
var (
	okFailed    = []string{"ok", "failed"}
	okLost      = []string{"ok", "lost"}
	noYes       = []string{"no", "yes"}
	quietFiring = []string{"quiet", "firing"}
	threeLevel  = []string{"ok", "degraded", "down"}
)

// missionHours is the window every rate is integrated over.
const missionHours = 24

// builder collects variables and the first error met.
type builder struct {
	vars  []model.Variable
	index map[string]int
	err   error
}

func newBuilder() *builder { return &builder{index: map[string]int{}} }

func (b *builder) fail(format string, args ...any) {
	if b.err == nil {
		b.err = fmt.Errorf(format, args...)
	}
}

// add appends v; names must be new and parents already added.
func (b *builder) add(v model.Variable) string {
	if _, dup := b.index[v.Name]; dup {
		b.fail("variable %q generated twice", v.Name)
		return v.Name
	}
	for _, p := range v.Parents {
		if _, ok := b.index[p]; !ok {
			b.fail("variable %q: parent %q not generated before it", v.Name, p)
		}
	}
	b.index[v.Name] = len(b.vars)
	b.vars = append(b.vars, v)
	return v.Name
}

// states returns the states of an added variable.
func (b *builder) states(name string) []string {
	i, ok := b.index[name]
	if !ok {
		b.fail("unknown variable %q", name)
		return nil
	}
	return b.vars[i].States
}

func (b *builder) dist(ppm ...int) []float64 {
	d, err := dist(ppm...)
	if err != nil {
		b.fail("%v", err)
	}
	return d
}

// root adds a parentless event in its second state with probability ppm.
func (b *builder) root(name, desc string, states []string, ppm int) string {
	return b.add(model.Variable{Name: name, Description: desc, States: states,
		Table: [][]float64{b.dist(million-ppm, ppm)}})
}

// rate adds a parentless event with a constant failure rate of
// perMillionHours failures per million hours over the mission window.
func (b *builder) rate(name, desc string, states []string, perMillionHours int) string {
	return b.add(model.Variable{Name: name, Description: desc, States: states,
		FailureRate: &model.FailureRate{Lambda: pr(perMillionHours), MissionTime: missionHours}})
}

// gate adds deterministic fault-tree logic over parents.
func (b *builder) gate(name, desc string, states []string, typ string, k int, parents ...string) string {
	return b.add(model.Variable{Name: name, Description: desc, States: states, Parents: parents,
		Gate: &model.Gate{Type: typ, K: k}})
}

// link is one noisy-OR cause: a parent and its link probability in ppm.
type link struct {
	parent string
	ppm    int
}

// noisyOR adds a two-state noisy-OR with a leak.
func (b *builder) noisyOR(name, desc string, states []string, leakPPM int, links ...link) string {
	v := model.Variable{Name: name, Description: desc, States: states,
		NoisyOR: &model.NoisyOR{Leak: pr(leakPPM), Links: map[string]float64{}}}
	for _, l := range links {
		v.Parents = append(v.Parents, l.parent)
		v.NoisyOR.Links[l.parent] = pr(l.ppm)
	}
	return b.add(v)
}

// effect is what one non-normal state of a noisy-MAX parent produces on
// its own, in ppm over the child's states.
type effect struct {
	state string
	ppm   []int
}

// cause is a noisy-MAX parent and the effect of each of its non-normal states.
type cause struct {
	parent  string
	effects []effect
}

// noisyMAX adds a graded variable (states from normal to worst).
func (b *builder) noisyMAX(name, desc string, states []string, leak []int, causes ...cause) string {
	v := model.Variable{Name: name, Description: desc, States: states,
		NoisyMAX: &model.NoisyMAX{Leak: b.dist(leak...), Links: map[string]map[string][]float64{}}}
	for _, c := range causes {
		v.Parents = append(v.Parents, c.parent)
		m := map[string][]float64{}
		for _, e := range c.effects {
			m[e.state] = b.dist(e.ppm...)
		}
		v.NoisyMAX.Links[c.parent] = m
	}
	return b.add(v)
}

// alarm adds an alarm on a two-state parent: it fires with probability
// falsePPM while the parent is normal and stays quiet with probability
// missPPM while it is faulty.
func (b *builder) alarm(name, desc, parent string, falsePPM, missPPM int) string {
	if n := len(b.states(parent)); n != 2 {
		b.fail("alarm %q: parent %q has %d states, want 2", name, parent, n)
	}
	return b.add(model.Variable{Name: name, Description: desc, States: quietFiring, Parents: []string{parent},
		Table: [][]float64{b.dist(million-falsePPM, falsePPM), b.dist(missPPM, million-missPPM)}})
}

// alarm3 adds an alarm on an ok/degraded/down parent: false alarms while
// ok, firing with probability degradedPPM while degraded, missing a down
// parent with probability missPPM.
func (b *builder) alarm3(name, desc, parent string, falsePPM, degradedPPM, missPPM int) string {
	if n := len(b.states(parent)); n != 3 {
		b.fail("alarm %q: parent %q has %d states, want 3", name, parent, n)
	}
	return b.add(model.Variable{Name: name, Description: desc, States: quietFiring, Parents: []string{parent},
		Table: [][]float64{b.dist(million-falsePPM, falsePPM), b.dist(million-degradedPPM, degradedPPM), b.dist(missPPM, million-missPPM)}})
}

// write renders the document: a header, then one variable per line.
func write(name, description string, vars []model.Variable) ([]byte, error) {
	var buf bytes.Buffer
	enc := func(v any) ([]byte, error) {
		var tmp bytes.Buffer
		e := json.NewEncoder(&tmp)
		e.SetEscapeHTML(false)
		if err := e.Encode(v); err != nil {
			return nil, err
		}
		return bytes.TrimSuffix(tmp.Bytes(), []byte("\n")), nil
	}
	n, err := enc(name)
	if err != nil {
		return nil, fmt.Errorf("encode model name: %w", err)
	}
	d, err := enc(description)
	if err != nil {
		return nil, fmt.Errorf("encode model description: %w", err)
	}
	fmt.Fprintf(&buf, "{\n  \"name\": %s,\n  \"description\": %s,\n  \"variables\": [\n", n, d)
	for i := range vars {
		line, err := enc(&vars[i])
		if err != nil {
			return nil, fmt.Errorf("encode variable %q: %w", vars[i].Name, err)
		}
		buf.WriteString("    ")
		buf.Write(line)
		if i < len(vars)-1 {
			buf.WriteByte(',')
		}
		buf.WriteByte('\n')
	}
	buf.WriteString("  ]\n}\n")
	return buf.Bytes(), nil
}

// splitmix64 is a small fixed-seed generator for placement choices; its
// output is defined by integer arithmetic alone (SplitMix64: Steele, Lea and
// Flood 2014, with the 64-bit finaliser in common use).
type splitmix64 struct{ s uint64 }

func (r *splitmix64) next() uint64 {
	r.s += 0x9e3779b97f4a7c15
	z := r.s
	z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9
	z = (z ^ (z >> 27)) * 0x94d049bb133111eb
	return z ^ (z >> 31)
}

// intn returns a number in [0, n) (n > 0); the tiny modulo bias does not
// matter for placing instances.
func (r *splitmix64) intn(n int) int { return int(r.next() % uint64(n)) }

// choose returns k distinct numbers from [0, n) in the order drawn.
func (r *splitmix64) choose(n, k int) []int {
	all := make([]int, n)
	for i := range all {
		all[i] = i
	}
	for i := 0; i < k; i++ {
		j := i + r.intn(n-i)
		all[i], all[j] = all[j], all[i]
	}
	return all[:k]
}

// errEmpty guards against a generator change that drops everything.
var errEmpty = errors.New("generated no variables")
