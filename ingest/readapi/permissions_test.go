package readapi_test

import (
	"context"
	"encoding/json"
	"errors"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"driftfit/alert"
	"driftfit/ingest"
	"driftfit/ingest/readapi"
	"driftfit/rolling"
	"driftfit/store"
)

// permissionsConf is the README's "Who may do what" configuration.
const permissionsConf = "../testdata/permissions.conf"

// testPasswords are the passwords the configuration reads from the
// environment; invented for the test.
var testPasswords = map[string]string{
	"DRIFTFIT_NATS_PASSWORD": "svc-9Hq2",
	"QM_PLANT_PASSWORD":      "plant-4Zr7",
	"QM_TECH_U1_PASSWORD":    "tech-8Kw1",
	"QM_READER_PASSWORD":     "reader-2Jd5",
}

// violations collects the permission violations a connection is told of.
type violations struct {
	mu  sync.Mutex
	got []string
}

func (v *violations) handler(_ *nats.Conn, _ *nats.Subscription, err error) {
	if errors.Is(err, nats.ErrPermissionViolation) {
		v.mu.Lock()
		v.got = append(v.got, err.Error())
		v.mu.Unlock()
	}
}

// waitFor waits until a violation naming subject is seen.
func (v *violations) waitFor(t *testing.T, who, subject string) {
	t.Helper()
	deadline := time.Now().Add(5 * time.Second)
	for time.Now().Before(deadline) {
		v.mu.Lock()
		for _, s := range v.got {
			if strings.Contains(s, `"`+subject+`"`) {
				v.mu.Unlock()
				return
			}
		}
		v.mu.Unlock()
		time.Sleep(10 * time.Millisecond)
	}
	t.Errorf("%s: no permissions violation for %s; seen %q", who, subject, v.got)
}

// roleConn is a connection as one of the configured users.
type roleConn struct {
	nc *nats.Conn
	v  *violations
}

// TestPermissions_DocumentedConfig runs the documented server
// configuration with a running service connected as its service user,
// and checks every role can do its part and nothing else: a publisher
// cannot calibrate or read, a reader cannot publish readings or
// calibrate, a technician calibrates unit 1's sensors and no others.
func TestPermissions_DocumentedConfig(t *testing.T) {
	for k, v := range testPasswords {
		t.Setenv(k, v)
	}
	o, err := server.ProcessConfigFile(permissionsConf)
	if err != nil {
		t.Fatal(err)
	}
	o.Host, o.Port, o.JetStream, o.StoreDir, o.NoLog, o.NoSigs = "127.0.0.1", -1, true, t.TempDir(), true, true
	ns, err := server.NewServer(o)
	if err != nil {
		t.Fatal(err)
	}
	go ns.Start()
	if !ns.ReadyForConnections(10 * time.Second) {
		t.Fatal("NATS server not ready")
	}
	t.Cleanup(ns.Shutdown)
	url := ns.ClientURL()

	conn := func(user, env string) roleConn {
		t.Helper()
		v := &violations{}
		nc, err := nats.Connect(url, nats.UserInfo(user, testPasswords[env]), nats.ErrorHandler(v.handler))
		if err != nil {
			t.Fatalf("connect as %s: %v", user, err)
		}
		t.Cleanup(nc.Close)
		return roleConn{nc: nc, v: v}
	}
	svcConn := conn("driftfit", "DRIFTFIT_NATS_PASSWORD")
	svc := startService(t, svcConn.nc)

	plant := conn("qm-plant", "QM_PLANT_PASSWORD")
	tech := conn("qm-tech-u1", "QM_TECH_U1_PASSWORD")
	reader := conn("qm-reader", "QM_READER_PASSWORD")

	// The publisher's readings are taken, with a JetStream acknowledgement.
	js, err := plant.nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Now().Add(-time.Hour)
	for _, id := range []string{"qm.u1.steam.pt-101", "qm.u2.steam.pt-101"} {
		for k := range 3 {
			data := ingest.AppendReading(nil, ingest.Decoded{Reading: rolling.Reading{UnixNano: t0.Add(time.Duration(k) * time.Minute).UnixNano(), Value: 1000}})
			if _, err := js.Publish("driftfit.in."+id, data, nats.AckWait(5*time.Second)); err != nil {
				t.Fatalf("publisher: reading of %s: %v", id, err)
			}
		}
	}
	for deadline := time.Now().Add(10 * time.Second); svc.Stats().Applied < 6; time.Sleep(10 * time.Millisecond) {
		if time.Now().After(deadline) {
			t.Fatalf("service applied %d of the publisher's 6 readings", svc.Stats().Applied)
		}
	}
	cal := ingest.CalibrationMsg{AsFound: 1000.4, AsLeft: 1000}
	calibrate := func(rc roleConn, id string) error {
		data, err := json.Marshal(cal)
		if err != nil {
			t.Fatal(err)
		}
		ctx, cancel := context.WithTimeout(t.Context(), time.Second)
		defer cancel()
		_, err = rc.nc.RequestWithContext(ctx, "driftfit.calibrations."+id, data)
		return err
	}
	// The technician calibrates unit 1 (the sensor is known: the
	// publisher's readings arrived), and is refused unit 2.
	if err := calibrateAs(t, url, "qm-tech-u1", testPasswords["QM_TECH_U1_PASSWORD"], "qm.u1.steam.pt-101", cal); err != nil {
		t.Errorf("technician: calibration of its own sensor: %v", err)
	}
	if err := calibrateAs(t, url, "qm-tech-u1", testPasswords["QM_TECH_U1_PASSWORD"], "qm.u2.steam.pt-101", cal); !errors.Is(err, readapi.ErrRefused) {
		t.Errorf("technician: client's calibration of another unit's sensor = %v, want ErrRefused", err)
	}
	// One client, refused once, is not refused what it may do next (the
	// bus keeps the connection's last error).
	tc, err := readapi.DialBus(ingest.BusOptions{Servers: []string{url}, User: "qm-tech-u1", PasswordEnv: "PW",
		Getenv: func(string) string { return testPasswords["QM_TECH_U1_PASSWORD"] }}, "driftfit test")
	if err != nil {
		t.Fatal(err)
	}
	defer tc.Close()
	if _, err := tc.Calibrate(t.Context(), "driftfit.calibrations", "qm.u2.steam.pt-101", cal); !errors.Is(err, readapi.ErrRefused) {
		t.Errorf("technician: calibration of another unit's sensor = %v, want ErrRefused", err)
	}
	if _, err := tc.Calibrate(t.Context(), "driftfit.calibrations", "qm.u1.steam.pt-101", cal); err != nil {
		t.Errorf("technician: own sensor after a refusal on the same connection: %v", err)
	}
	if err := calibrate(tech, "qm.u2.steam.pt-101"); err == nil {
		t.Error("technician: calibration of another unit's sensor answered")
	}
	tech.v.waitFor(t, "technician", "driftfit.calibrations.qm.u2.steam.pt-101")

	// The publisher cannot calibrate, nor read.
	if err := calibrate(plant, "qm.u1.steam.pt-101"); err == nil {
		t.Error("publisher: calibration answered")
	}
	plant.v.waitFor(t, "publisher", "driftfit.calibrations.qm.u1.steam.pt-101")
	if err := plant.nc.Publish(readapi.SensorsSubject, nil); err != nil {
		t.Fatal(err)
	}
	plant.v.waitFor(t, "publisher", readapi.SensorsSubject)

	// The reader reads through the read API, with the same options as
	// the read commands; it cannot publish readings or calibrate.
	rc, err := readapi.DialBus(ingest.BusOptions{Servers: []string{url}, User: "qm-reader", PasswordEnv: "QM_READER_PASSWORD"}, "driftfit test")
	if err != nil {
		t.Fatal(err)
	}
	defer rc.Close()
	var tickets int
	if err := rc.Tickets(func(string, []byte) error { tickets++; return nil }); err != nil {
		t.Errorf("reader: tickets: %v", err)
	}
	if err := reader.nc.Publish("driftfit.in.qm.u1.steam.pt-101", []byte(`{"t":"2026-03-01T00:00:00Z","v":1}`)); err != nil {
		t.Fatal(err)
	}
	reader.v.waitFor(t, "reader", "driftfit.in.qm.u1.steam.pt-101")
	if err := calibrate(reader, "qm.u1.steam.pt-101"); err == nil {
		t.Error("reader: calibration answered")
	}
	reader.v.waitFor(t, "reader", "driftfit.calibrations.qm.u1.steam.pt-101")

	// The service itself did all of this within its own permissions.
	svcConn.v.mu.Lock()
	defer svcConn.v.mu.Unlock()
	if len(svcConn.v.got) > 0 {
		t.Errorf("service user: permissions violations %q", svcConn.v.got)
	}
}

// calibrateAs sends a calibration with the client the calibrated command
// uses, as user.
func calibrateAs(t *testing.T, url, user, password, id string, cal ingest.CalibrationMsg) error {
	t.Helper()
	c, err := readapi.DialBus(ingest.BusOptions{Servers: []string{url}, User: user, PasswordEnv: "PW",
		Getenv: func(string) string { return password }}, "driftfit test")
	if err != nil {
		return err
	}
	defer c.Close()
	_, err = c.Calibrate(t.Context(), "driftfit.calibrations", id, cal)
	return err
}

// startService runs a service in stream mode on nc with a real bbolt
// file, and its read API.
func startService(t *testing.T, nc *nats.Conn) *ingest.Service {
	t.Helper()
	db, err := store.Open(filepath.Join(t.TempDir(), "driftfit.db"), store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	windows := []rolling.WindowSpec{{Span: 24 * time.Hour, Pane: time.Hour}}
	svc, err := ingest.New(ingest.Options{
		Conn: nc, DB: db,
		Sensor:         func(string) (ingest.SensorConfig, error) { return ingest.SensorConfig{Windows: windows}, nil },
		Rule:           func(string) (alert.Rule, bool) { return alert.Rule{}, false },
		CommitInterval: 20 * time.Millisecond,
	})
	if err != nil {
		t.Fatal(err)
	}
	stopAPI, err := readapi.Serve(nc, db, zerolog.Nop(), svc.Subjects()...)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- svc.Run(ctx) }()
	t.Cleanup(func() {
		stopAPI()
		cancel()
		if err := <-done; err != nil && !errors.Is(err, context.Canceled) {
			t.Errorf("service: %v", err)
		}
		db.Close()
	})
	return svc
}
