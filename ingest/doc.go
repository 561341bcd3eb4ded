// Package ingest owns the per-reading flow of the service, from the bytes
// on the bus to the decisions on it: decode → validate → fold into the
// sensor's windows → pane close → fit → alert decision → commit → publish
// → acknowledge. It is the only importer of the NATS client (besides the
// tools under cmd/driftfit/internal), and it also holds the decoders of
// outside bytes: times (ParseTime), replay files (CSVReader) and NATS
// payloads (Decoder).
//
// # The flow
//
// A Service routes each message by its subject's sensor id to one of a
// fixed set of workers; every member of a peer group goes to the group's
// worker. A worker owns its sensors outright — windows, alert trackers,
// peer groups — so nothing on the hot path takes a lock. Calibrations
// (and Restart) enter through the same dispatcher, behind the readings
// already routed to the sensor.
//
// Every commit is one bbolt transaction written by the one committer
// goroutine: the changed panes of the sensors it takes, their alert
// state, events, tickets and outbox items, the fit records of the pane
// closes, each sensor's stream sequence and the stream position. A
// decision is therefore stored with the state it derives from: after a
// crash a restart from the stored position makes exactly the decisions
// not yet committed, none twice. A commit takes every sensor with a
// decision or a calibration waiting (such a commit starts as soon as the
// committer is free) and at most Options.CommitMaxSensors others, so a
// decision never waits behind a commit of the whole fleet.
//
// Everything published about alerts goes out from the stored outbox after
// its commit: alert events and tickets on NATS with Nats-Msg-Id set to a
// stable id (a stream capturing those subjects drops a re-send after a
// crash; a core subscriber keeps the ids it has seen), ticket revisions
// to the webhook with an Idempotency-Key. Sent items are deleted by a
// later commit. A calibration's reply is sent once its commit is done.
//
// # Calibration records
//
// Each calibration is stored as a CalibrationRecord, numbered per sensor,
// with what it replaced (the readings cutoff, the trackers' alert.Prior),
// in the same commit as the sensor's state. A void or correction names
// the record, which must be the sensor's latest in force, and goes the
// same ordered path (calrecord.go): a void gives the trackers back their
// prior state and the cutoff its previous value, a correction records a
// new number; the old record stays, marked. A worker reads a sensor's
// records from the file on its first calibration request and keeps them.
//
// # Where to add things
//
//   - A payload shape: Decoder.Decode in payload.go (with a case in
//     payload_test.go, payload_ref_test.go against encoding/json, and a
//     seed for FuzzDecodePayload in testdata/fuzz).
//   - A reason for refusing input: reason.go, then the README's list.
//   - Something the flow decides per pane close: worker.judge in
//     alerts.go; what it stores goes through worker.decided, so it lands
//     in the sensor's next commit.
//   - A detector (step, spike, flatline, silent, out of span): detect.go,
//     reported through the sensor's own tracker (alert.Tracker.Observe);
//     peer-group comparison and attribution: peers.go.
//
// # Peer groups, detectors, judgements
//
// A peer-group member is judged on its deviation from the median of the
// group's usable members (alert.PeerDeviations), and ticketed only when
// alert.Attribute names it; see peerGroup in peers.go for the watermarks
// that decide when a time bucket is compared. The step and data-quality
// detectors run beside the fits (detectState in detect.go); a spike is
// kept out of the fits. Every window's latest alert.Judgement is counted
// by reason (Metrics.NotJudged), logged when it changes, and readable
// through Service.Judgements.
//
// # Decoding contract
//
// Decoders never panic on input bytes. A problem with a single reading or
// row is reported with the field and a bounded copy of the offending value,
// and the good readings around it are kept. Hot paths do not allocate per
// reading: returned byte slices alias the input or an internal buffer, and
// each type documents how long they stay valid.
//
// Decoders are not safe for concurrent use; give each goroutine its own
// CSVReader or Decoder. ParseTime and the Append functions are safe to
// call from any goroutine. A Service is safe for concurrent use through
// its methods (Stats, Restart, Calibrate, VoidCalibration,
// CorrectCalibration); Run is called once.
package ingest
