// Package codec owns how the hot frames of a session cross gRPC without
// the copies and allocations of the generic protobuf path: a gRPC codec
// (encoding.CodecV2) that hands a received message over as the buffers
// gRPC read it into (Frame, parsed in place with Cursor), that lets a
// frame write its own protobuf encoding straight into a pooled buffer
// (Sender, with the field writers of write.go), and that passes every
// other message to the standard proto codec unchanged. The bytes on the
// wire are ordinary protobuf: clients that use the standard codec (the
// Python and C++ ones) see no difference. It also owns the buffer pool
// both ends give gRPC (Pool).
//
// Who uses what: the server forces the codec on every call
// (grpc.ForceServerCodecV2), receives a session's answers into a Frame
// and sends Points and Draws frames as Senders; the Go client puts the
// codec on its session streams (grpc.ForceCodecV2), receives Points into
// a Frame and sends Evaluations as a Sender. Each side's hand parser
// falls back to proto.Unmarshal for any frame it does not own, and its
// tests hold it to proto.Unmarshal and proto.Marshal on random and
// adversarial input.
package codec

import (
	"fmt"

	"google.golang.org/grpc/encoding"
	_ "google.golang.org/grpc/encoding/proto" // registers the "proto" codec this one delegates to
	"google.golang.org/grpc/mem"
)

// Name is the codec's name, and so the content-subtype a client using it
// sends ("application/grpc+proto"): the bytes are protobuf, so any
// server, sluice's or another, reads them with its proto codec.
const Name = "proto"

// Sender is a message that writes its own protobuf encoding.
type Sender interface {
	// WireSize is the length of the encoding in bytes.
	WireSize() int
	// AppendWire appends exactly WireSize bytes to b and returns the
	// extended slice; b has room for them.
	AppendWire(b []byte) []byte
}

// Receiver is a message that takes the received bytes as they are, in
// gRPC's buffers: it must Ref what it keeps (Frame.Hold does).
type Receiver interface {
	Hold(data mem.BufferSlice)
}

// Codec is the gRPC codec: Senders and Receivers are handled here, every
// other message by the standard proto codec.
type Codec struct {
	pool  mem.BufferPool
	proto encoding.CodecV2
}

// New returns a codec whose Senders write into buffers of pool (nil:
// Pool()).
func New(pool mem.BufferPool) *Codec {
	if pool == nil {
		pool = Pool()
	}
	return &Codec{pool: pool, proto: encoding.GetCodecV2(Name)}
}

// Name implements encoding.CodecV2.
func (c *Codec) Name() string { return Name }

// Marshal implements encoding.CodecV2.
func (c *Codec) Marshal(v any) (mem.BufferSlice, error) {
	s, ok := v.(Sender)
	if !ok {
		return c.proto.Marshal(v)
	}
	n := s.WireSize()
	// A buffer above gRPC's pooling threshold even for a small message,
	// so that it goes back to the pool (mem.NewBuffer keeps smaller ones
	// as plain slices, allocated anew every time).
	size := max(n, 256)
	for mem.IsBelowBufferPoolingThreshold(size) {
		size *= 2
	}
	buf := c.pool.Get(size)
	b := s.AppendWire((*buf)[:0])
	if len(b) != n || n > 0 && &b[0] != &(*buf)[0] {
		c.pool.Put(buf)
		return nil, fmt.Errorf("codec: %T wrote %d bytes, announced %d", v, len(b), n)
	}
	*buf = b
	return mem.BufferSlice{mem.NewBuffer(buf, c.pool)}, nil
}

// Unmarshal implements encoding.CodecV2.
func (c *Codec) Unmarshal(data mem.BufferSlice, v any) error {
	if r, ok := v.(Receiver); ok {
		r.Hold(data)
		return nil
	}
	return c.proto.Unmarshal(data, v)
}
