// Package readapi is the read protocol between a running driftfit serve
// and the commands that read its state file while serve holds the file's
// lock (history, alerts, tickets, calibrated): the subjects, the request
// type, the chunked replies, and both ends of it, Serve and Client.
//
// # Protocol
//
// A request is a NATS request on one of the subjects below, its payload
// a JSON Request (empty for the sensor list and tickets). The answer is
// one or more messages to the request's reply inbox, each at most about
// ChunkBytes of payload: every message but the last carries the header
// Driftfit-More: 1, and the last carries Driftfit-Error when the request
// failed part way. Payloads are:
//
//   - history: fit-history records back to back, in the store's record
//     encoding (store.AppendHistoryRecord), in the order store.DB.History
//     returns them;
//   - sensors: sensor ids, each followed by a newline;
//   - events: per event its time (varint Unix ns) and its JSON as a frame
//     (uvarint length, then the bytes);
//   - tickets: per ticket its id as a frame, then its JSON as a frame;
//   - calibrations (request: a JSON Request, Sensor "" for all): per
//     record the sensor id as a frame, its number as a uvarint, then
//     the record's JSON as a frame (empty when damaged in the file);
//   - identity: a JSON Identity, in one message.
//
// Calibrations travel the other way, as a request on
// <calibration prefix>.<sensor> with a JSON ingest.CalibrationMsg (a
// calibration, or a void or correction of one), answered with a JSON
// ingest.CalibrationReply once stored ({"ok":true,"record":{...}}), or
// {"ok":false,"error":"..."}; Client sends them, ingest answers them.
package readapi

import "time"

// Subjects of the read API, all under Prefix.
const (
	Prefix         = "driftfit.api"
	HistorySubject = Prefix + ".history"
	SensorsSubject = Prefix + ".sensors"
	EventsSubject  = Prefix + ".events"
	TicketsSubject = Prefix + ".tickets"
	// CalibrationsSubject lists calibration records.
	CalibrationsSubject = Prefix + ".calibrations"
	IdentitySubject     = Prefix + ".identity"
)

// Reply headers.
const (
	HeaderMore  = "Driftfit-More"  // "1" on every reply but the last
	HeaderError = "Driftfit-Error" // on the last reply, when the request failed
)

const (
	// ChunkBytes bounds one reply's payload, well under NATS's default
	// 1 MiB max_payload.
	ChunkBytes = 256 << 10
	// Timeout bounds the wait for each reply message.
	Timeout = 10 * time.Second
	// DefaultURL is where clients look for a running service by default:
	// the embedded NATS server's default address.
	DefaultURL = "nats://127.0.0.1:4222"
)

// Identity is the answer on IdentitySubject (empty request): which
// state file the service holds, so a client given a file can check it is
// asking the service that holds that file.
type Identity struct {
	// Path is the state file's absolute path, symbolic links resolved
	// (CanonicalPath).
	Path string `json:"path"`
}

// Request is the JSON request of the history and events subjects. Zero
// fields leave that filter open.
type Request struct {
	Sensor  string `json:"sensor"`
	SpanNs  int64  `json:"span_ns,omitempty"`
	PaneNs  int64  `json:"pane_ns,omitempty"`
	SinceNs int64  `json:"since_ns,omitempty"`
	UntilNs int64  `json:"until_ns,omitempty"`
}

// Times returns the request's time range; zero ends are open.
func (q *Request) Times() (since, until time.Time) {
	if q.SinceNs != 0 {
		since = time.Unix(0, q.SinceNs)
	}
	if q.UntilNs != 0 {
		until = time.Unix(0, q.UntilNs)
	}
	return since, until
}
