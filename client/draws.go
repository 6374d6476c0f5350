package client

// KeepDraws makes Run (and Follow) keep every draw received in
// Summary.Draws, in sequence order, besides any OnDraws callback.
func KeepDraws() Option { return func(c *config) { c.keepDraws = true } }

// DrawSet is every draw a session or follower received, in sequence
// order: row i is Values[i*Dim:(i+1)*Dim], taken from chain Chains[i]
// after Iterations[i] steps.
type DrawSet struct {
	Dim        int
	Values     []float64
	Chains     []int
	Iterations []int64
}

// Rows returns the number of draws held.
func (s *DrawSet) Rows() int { return len(s.Chains) }

// Row returns draw i.
func (s *DrawSet) Row(i int) []float64 { return s.Values[i*s.Dim : (i+1)*s.Dim] }

// add appends a block; a nil set ignores it.
func (s *DrawSet) add(d *Draws) {
	if s == nil {
		return
	}
	s.Dim = d.Dim
	s.Values = append(s.Values, d.Values...)
	s.Chains = append(s.Chains, d.Chains...)
	s.Iterations = append(s.Iterations, d.Iterations...)
}
