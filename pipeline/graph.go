package pipeline

import (
	"fmt"
	"sort"
	"strings"
	"time"
)

// Derivation computes output channels from input channels. Implementations live
// in derive/ adapters and must be pure apart from their own state: time comes in
// as the time of the sample that triggered the computation.
//
// Derive is called from the pipeline's single ingest goroutine only, so an
// implementation needs no locking. in holds the inputs in the order of Inputs;
// out has one slot per output in the order of Outputs. Derive reports which
// outputs it wrote as a bit mask (bit i = out[i]); 0 means no value this time.
type Derivation interface {
	Name() string
	Inputs() []Input
	Outputs() []Channel
	Derive(t time.Time, in []float64, out []float64) (written uint64)
}

// Input names a channel a derivation reads, with the maximum age its value may
// have relative to the triggering sample. Optional inputs that are missing or
// stale are passed as NaN instead of suppressing the derivation.
type Input struct {
	Name     string
	MaxAge   time.Duration // 0: the channel's own maximum age
	Optional bool
}

// node is a derivation bound to channel IDs.
type node struct {
	d      Derivation
	in     []ChannelID
	inAge  []time.Duration
	inOpt  []bool
	out    []ChannelID
	inBuf  []float64
	outBuf []float64
	order  int
}

// Graph is a set of derivations bound to a registry and sorted so that every
// derivation runs after the derivations that write its inputs.
type Graph struct {
	nodes []*node
	// dependents[ch] lists, in topological order, every node that must be
	// recomputed when ch changes (directly or through other nodes).
	dependents [][]*node
}

// BuildGraph registers the outputs of ds in reg, resolves their inputs and orders
// them. It fails on an unknown input, an output written twice, or a cycle.
func BuildGraph(reg *Registry, ds []Derivation) (*Graph, error) {
	g := &Graph{}
	writer := map[ChannelID]*node{}
	for _, d := range ds {
		n := &node{d: d}
		for _, c := range d.Outputs() {
			if c.Source == "" {
				c.Source = "derived"
			}
			if _, exists := reg.Lookup(c.Name); exists {
				if _, dup := writer[mustLookup(reg, c.Name)]; dup {
					return nil, fmt.Errorf("derivation %s: output %q already written by another derivation", d.Name(), c.Name)
				}
			}
			id, err := reg.Register(c)
			if err != nil {
				return nil, fmt.Errorf("derivation %s: %w", d.Name(), err)
			}
			if _, dup := writer[id]; dup {
				return nil, fmt.Errorf("derivation %s: output %q already written by another derivation", d.Name(), c.Name)
			}
			writer[id] = n
			n.out = append(n.out, id)
		}
		if len(n.out) > 64 {
			return nil, fmt.Errorf("derivation %s: more than 64 outputs", d.Name())
		}
		g.nodes = append(g.nodes, n)
	}
	for _, n := range g.nodes {
		for _, in := range n.d.Inputs() {
			id, ok := reg.Lookup(in.Name)
			if !ok {
				if in.Optional {
					// No source provides this optional input: it is always NaN.
					n.in = append(n.in, noChannel)
					n.inAge = append(n.inAge, 0)
					n.inOpt = append(n.inOpt, true)
					continue
				}
				return nil, fmt.Errorf("derivation %s: input %q is not a known channel", n.d.Name(), in.Name)
			}
			age := in.MaxAge
			if age <= 0 {
				age = reg.Channel(id).Age()
			}
			n.in = append(n.in, id)
			n.inAge = append(n.inAge, age)
			n.inOpt = append(n.inOpt, in.Optional)
		}
		n.inBuf = make([]float64, len(n.d.Inputs()))
		n.outBuf = make([]float64, len(n.out))
	}
	// Topological order (Kahn), deterministic by declaration order.
	indeg := map[*node]int{}
	succ := map[*node][]*node{}
	for _, n := range g.nodes {
		for _, id := range n.in {
			if w, ok := writer[id]; ok {
				if w == n {
					return nil, fmt.Errorf("derivation %s reads its own output %q", n.d.Name(), reg.Channel(id).Name)
				}
				succ[w] = append(succ[w], n)
				indeg[n]++
			}
		}
	}
	var order []*node
	var queue []*node
	for _, n := range g.nodes {
		if indeg[n] == 0 {
			queue = append(queue, n)
		}
	}
	for len(queue) > 0 {
		n := queue[0]
		queue = queue[1:]
		n.order = len(order)
		order = append(order, n)
		for _, s := range succ[n] {
			indeg[s]--
			if indeg[s] == 0 {
				queue = append(queue, s)
			}
		}
	}
	if len(order) != len(g.nodes) {
		var stuck []string
		for _, n := range g.nodes {
			if indeg[n] > 0 {
				stuck = append(stuck, n.d.Name())
			}
		}
		return nil, fmt.Errorf("derivation cycle among: %s", strings.Join(stuck, ", "))
	}
	g.nodes = order
	// Transitive dependents per channel.
	g.dependents = make([][]*node, reg.Len())
	for ch := range g.dependents {
		seen := map[*node]bool{}
		var visit func(id ChannelID)
		visit = func(id ChannelID) {
			for _, n := range g.nodes {
				if seen[n] {
					continue
				}
				for _, in := range n.in {
					if in == id {
						seen[n] = true
						for _, o := range n.out {
							visit(o)
						}
						break
					}
				}
			}
		}
		visit(ChannelID(ch))
		var deps []*node
		for n := range seen {
			deps = append(deps, n)
		}
		sort.Slice(deps, func(i, j int) bool { return deps[i].order < deps[j].order })
		g.dependents[ch] = deps
	}
	return g, nil
}

// noChannel marks an optional input that no source provides.
const noChannel ChannelID = 1<<16 - 1

func mustLookup(reg *Registry, name string) ChannelID {
	id, _ := reg.Lookup(name)
	return id
}

// Names returns the derivation names in evaluation order.
func (g *Graph) Names() []string {
	var s []string
	for _, n := range g.nodes {
		s = append(s, n.d.Name())
	}
	return s
}
