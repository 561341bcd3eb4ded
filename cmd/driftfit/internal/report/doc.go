// Package report writes what the commands print: fits (replay), fit
// history (history), alert events (alerts) and recalibration tickets
// (tickets), in the formats of one registry.
//
// # Formats
//
// A format is a name and a constructor of a Writer; New looks a name up
// and checks that the format can write the kind of record asked for.
// table is for people (aligned columns, numbers rounded to the digits
// their uncertainty leaves meaningful, with units, sensor ids escaped);
// csv and json are for programs (every digit, shortest round trip); png
// and svg draw fit history as a picture.
//
// # Adding an output format
//
// Write a type with the methods of Writer (returning ErrUnsupported for
// the kinds it cannot show) and add one entry to the formats table in
// format.go: its name, the kinds it writes, and its constructor. Every
// command that takes --format then offers it, and its usage errors list
// it.
package report
