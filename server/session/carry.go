package session

import "sluice/internal/wire"

// Draws carried in Points frames (Spec.DrawsInPoints).
//
// A completed step's draws go out right after the next request's Points
// frames (run.pending, flush), most often by reference to those very
// points. For a client that reads draws inside Points frames the engine
// holds the frames of one such burst (the request's Points frames, then
// the step's Draws and Progress frames) and, before sending them in
// their order, moves the first Draws frame into the Points frame just
// before it when that frame is the last part of its request and the two
// fit one message: the client then gets the same frames in the same
// order, one message fewer per step. Draws frames after the first (a
// step whose draws are split over several frames) and any other frame
// go out as they are.

// heldFrame is one frame of a held burst: a copy of a Points or Draws
// frame (the engine reuses its frames, so the burst keeps its own), or
// any other frame as sent.
type heldFrame struct {
	points int // index in carrier.points, or −1
	draws  int // index in carrier.draws, or −1
	other  Frame
}

// carrier holds one burst of frames; its buffers are reused from burst
// to burst.
type carrier struct {
	on     bool
	frames []heldFrame
	points []Points
	draws  []Draws
	// book is set when a kept step's bookkeeping (the final summaries'
	// running moments, the follow log) waits for the burst to go out:
	// the draws are x (the kernel's positions, unchanged until the next
	// step), numbered from bookSeq.
	book    bool
	bookSeq uint64
	x       []float64
	logged  Draws
	// progress is a Progress frame of the burst, logged after its draws.
	progress *Progress
}

// hold is the send function of a held burst.
func (s *Session) hold(f Frame) error {
	c := &s.carry
	switch f := f.(type) {
	case *Points:
		c.points = append(c.points, *f)
		c.frames = append(c.frames, heldFrame{points: len(c.points) - 1, draws: -1})
	case *Draws:
		c.draws = append(c.draws, *f)
		c.frames = append(c.frames, heldFrame{points: -1, draws: len(c.draws) - 1})
	default:
		c.frames = append(c.frames, heldFrame{points: -1, draws: -1, other: f})
	}
	return nil
}

// carrying reports whether the frames about to be sent for a request
// form a burst worth holding: the client reads draws in Points frames and
// a completed step's draws are pending. It starts the burst.
func (s *Session) carrying(r *run) bool {
	c := &s.carry
	c.on = s.spec.DrawsInPoints && r.pending
	c.frames, c.points, c.draws = c.frames[:0], c.points[:0], c.draws[:0]
	c.book, c.progress = false, nil
	return c.on
}

// release sends the held burst through send, the first Draws frame moved
// into the Points frame before it when it may be (see above).
func (s *Session) release(send func(Frame) error) error {
	c := &s.carry
	c.on = false
	into := -1 // the frame that carries the first Draws frame
	for i, h := range c.frames {
		if h.draws < 0 {
			continue
		}
		if i > 0 && c.frames[i-1].points >= 0 && s.fitsWith(&c.points[c.frames[i-1].points], &c.draws[h.draws]) {
			into = i - 1
		}
		break
	}
	for i := range c.frames {
		h := &c.frames[i]
		var err error
		switch {
		case h.points >= 0:
			p := &c.points[h.points]
			p.Draws = nil
			if i == into {
				p.Draws = &c.draws[c.frames[i+1].draws]
			}
			err = send(p)
		case h.draws >= 0:
			if i == into+1 && into >= 0 {
				continue // carried
			}
			err = send(&c.draws[h.draws])
		default:
			err = send(h.other)
		}
		if err != nil {
			return err
		}
	}
	s.bookCarried()
	return nil
}

// bookCarried does the bookkeeping of the draws sent in the burst just
// released: what sendDraws does before it sends when nothing is held.
func (s *Session) bookCarried() {
	c := &s.carry
	if c.book {
		c.book = false
		dim, chains := s.spec.Dim, s.spec.Chains
		s.accumulate(c.x, dim, chains)
		if s.log != nil {
			c.logged = Draws{Seq: c.bookSeq, Rows: chains, Dim: dim, Values: c.x[:chains*dim],
				Chains: s.drawChains[:chains], Iterations: s.drawIters[:chains]}
			s.log.append(&c.logged) // full values
		}
	}
	if c.progress != nil {
		s.log.progress(c.progress)
		c.progress = nil
	}
}

// fitsWith reports whether Draws frame d may ride in Points frame p: p is
// the last part of its request, and both fit one message of the
// session's limit, each sized as the engine sizes a frame of its own
// (wire.RowBytes per row, wire.FrameOverhead each).
func (s *Session) fitsWith(p *Points, d *Draws) bool {
	if p.FirstRow+p.Rows != p.TotalRows {
		return false
	}
	values := len(p.Points) + len(p.Vectors)
	size := 2*int64(wire.FrameOverhead) + 8*int64(values) + int64(p.Rows)*wire.RowOverhead +
		8*int64(len(d.Values)) + int64(d.Rows)*(wire.RowOverhead+8)
	return size <= s.msgBytes
}
