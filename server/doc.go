// Package server is the gRPC adapter of sluice. It translates wire frames
// (package sluicev1) to and from the transport-agnostic engine in
// server/session, maps engine errors to gRPC status codes through one
// table (status.go), runs the stream loop with exactly one sending and one
// receiving goroutine per session, and carries the service plumbing:
// health, reflection, panic recovery, logging, message size limits,
// session admission and graceful shutdown. A session's hot frames (an
// answer received, Points and Draws sent) cross the transport by hand
// through internal/codec's codec, read in place and written straight from
// the engine's frames (wireframes.go); every other message, on every
// service, goes through the standard proto codec.
//
// Sampling logic lives in the engine and the kernels, never here.
package server
