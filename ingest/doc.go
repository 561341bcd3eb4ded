// Package ingest turns bytes from the outside world into rolling.Reading
// values: times (ParseTime), replay files (CSVReader) and NATS message
// payloads (Decoder).
//
// # Decoding contract
//
// Decoders never panic on input bytes. A problem with a single reading or
// row is reported with the field and a bounded copy of the offending value,
// and the good readings around it are kept. Hot paths do not allocate per
// reading: returned byte slices alias the input or an internal buffer, and
// each type documents how long they stay valid.
//
// None of the types here are safe for concurrent use; give each goroutine
// its own CSVReader or Decoder. ParseTime and the Append functions are
// safe to call from any goroutine.
package ingest
