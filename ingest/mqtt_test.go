package ingest_test

import (
	"bufio"
	"bytes"
	"context"
	"errors"
	"fmt"
	"net"
	"path/filepath"
	"testing"
	"time"

	mqtt "github.com/eclipse/paho.mqtt.golang"
	"github.com/nats-io/nats.go"

	"driftfit/alert"
	"driftfit/ingest"
	"driftfit/rolling"
	"driftfit/store"
)

// mqttService runs the embedded server with an MQTT listener on a free
// loopback port, and a service in stream mode on it.
func mqttService(t *testing.T, users []ingest.BusUser, env map[string]string) (*ingest.Bus, *ingest.Service) {
	t.Helper()
	dir := t.TempDir()
	b, err := ingest.Connect(t.Context(), ingest.BusOptions{Port: -1, StoreDir: filepath.Join(dir, "nats"), MQTT: "127.0.0.1:-1",
		Users: users, Subjects: defaultSubjects, Getenv: func(k string) string { return env[k] }})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { b.Close() })
	if b.MQTTAddr() == "" {
		t.Fatal("no MQTT listener address")
	}
	db, err := store.Open(filepath.Join(dir, "driftfit.db"), store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	windows := []rolling.WindowSpec{{Span: 24 * time.Hour, Pane: time.Hour}}
	svc, err := ingest.New(ingest.Options{
		Conn: b.Conn(), DB: db,
		Sensor:         func(string) (ingest.SensorConfig, error) { return ingest.SensorConfig{Windows: windows}, nil },
		Rule:           func(string) (alert.Rule, bool) { return alert.Rule{}, false },
		CommitInterval: 20 * time.Millisecond,
	})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- svc.Run(ctx) }()
	t.Cleanup(func() {
		cancel()
		if err := <-done; err != nil && !errors.Is(err, context.Canceled) {
			t.Errorf("service: %v", err)
		}
		db.Close()
	})
	waitStream(t, b.Conn())
	return b, svc
}

// mqttClient connects an MQTT 3.1.1 client to addr.
func mqttClient(t *testing.T, addr, id, user, password string) (mqtt.Client, error) {
	t.Helper()
	o := mqtt.NewClientOptions().AddBroker("tcp://" + addr).SetClientID(id).SetProtocolVersion(4).
		SetConnectTimeout(5 * time.Second).SetAutoReconnect(false).SetConnectRetry(false)
	if user != "" {
		o.SetUsername(user).SetPassword(password)
	}
	c := mqtt.NewClient(o)
	tok := c.Connect()
	if !tok.WaitTimeout(10 * time.Second) {
		return nil, errors.New("MQTT connect timed out")
	}
	if err := tok.Error(); err != nil {
		return nil, err
	}
	t.Cleanup(func() { c.Disconnect(100) })
	return c, nil
}

func mqttPublish(t *testing.T, c mqtt.Client, topic string, qos byte, payload []byte) error {
	t.Helper()
	tok := c.Publish(topic, qos, false, payload)
	if !tok.WaitTimeout(10 * time.Second) {
		return fmt.Errorf("publish %s at QoS %d: timed out", topic, qos)
	}
	return tok.Error()
}

// waitApplied waits until the service has applied n readings.
func waitApplied(t *testing.T, svc *ingest.Service, n uint64) {
	t.Helper()
	for deadline := time.Now().Add(10 * time.Second); svc.Stats().Applied < n; time.Sleep(10 * time.Millisecond) {
		if time.Now().After(deadline) {
			t.Fatalf("service applied %d readings, want %d (stats %+v)", svc.Stats().Applied, n, svc.Stats())
		}
	}
}

// TestMQTT_ReadingsArrive publishes readings over MQTT at QoS 0 and 1 to
// driftfit/in/<id with dots as slashes> and checks they arrive as
// readings of the dotted id, a bad payload is refused as on NATS, and
// finds out what becomes of a dot inside a topic level.
func TestMQTT_ReadingsArrive(t *testing.T) {
	b, svc := mqttService(t, nil, nil)
	seen := make(chan string, 16)
	sub, err := b.Conn().Subscribe("driftfit.in.>", func(m *nats.Msg) { seen <- m.Subject })
	if err != nil {
		t.Fatal(err)
	}
	defer sub.Unsubscribe()
	rejected, err := b.Conn().SubscribeSync("driftfit.rejected")
	if err != nil {
		t.Fatal(err)
	}
	c, err := mqttClient(t, b.MQTTAddr(), "qm-plant-1", "", "")
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Now().Add(-time.Hour)
	reading := func(k int) []byte {
		return ingest.AppendReading(nil, ingest.Decoded{Reading: rolling.Reading{UnixNano: t0.Add(time.Duration(k) * time.Minute).UnixNano(), Value: 1000 + float64(k)}})
	}
	for k, qos := range []byte{0, 1, 0, 1} {
		if err := mqttPublish(t, c, "driftfit/in/qm/u1/steam/pt-101", qos, reading(k)); err != nil {
			t.Fatal(err)
		}
	}
	waitApplied(t, svc, 4)
	select {
	case s := <-seen:
		if s != "driftfit.in.qm.u1.steam.pt-101" {
			t.Errorf("MQTT topic driftfit/in/qm/u1/steam/pt-101 arrived on %q", s)
		}
	case <-time.After(5 * time.Second):
		t.Fatal("no reading seen on NATS")
	}
	// A calibration without force is refused for a sensor never seen: this
	// one is known under its dotted id.
	if err := svc.Calibrate(t.Context(), "qm.u1.steam.pt-101", alert.Calibration{Time: t0.Add(time.Hour), AsFound: 1003, AsLeft: 1000}, false); err != nil {
		t.Errorf("sensor qm.u1.steam.pt-101 unknown after MQTT readings: %v", err)
	}

	// The same validation as NATS: a payload that is not a reading is
	// refused and dead-lettered with its reason.
	before := svc.Stats().Rejected
	if err := mqttPublish(t, c, "driftfit/in/qm/u1/steam/pt-101", 1, []byte(`{"t":"yesterday","v":1}`)); err != nil {
		t.Fatal(err)
	}
	m, err := rejected.NextMsg(10 * time.Second)
	if err != nil {
		t.Fatalf("bad MQTT payload not dead-lettered: %v", err)
	}
	if svc.Stats().Rejected != before+1 || m.Header.Get(ingest.HeaderReason) == "" {
		t.Errorf("bad MQTT payload: rejected %d -> %d, headers %v", before, svc.Stats().Rejected, m.Header)
	}

	// A dot inside a topic level: nats-server maps it to "//" (its
	// mqtt.go: "'.' is replaced with '//'"), so it is a different sensor,
	// qm//u1.steam.pt-102, not qm.u1.steam.pt-102.
	if err := mqttPublish(t, c, "driftfit/in/qm.u1/steam/pt-102", 1, reading(10)); err != nil {
		t.Fatal(err)
	}
	for timeout := time.After(5 * time.Second); ; {
		select {
		case s := <-seen:
			if s == "driftfit.in.qm.u1.steam.pt-101" {
				continue // the readings before
			}
			if s != "driftfit.in.qm//u1.steam.pt-102" {
				t.Errorf("MQTT topic driftfit/in/qm.u1/steam/pt-102 arrived on %q, want driftfit.in.qm//u1.steam.pt-102", s)
			}
		case <-timeout:
			t.Fatal("reading with a dot in a topic level not seen on NATS")
		}
		break
	}
	waitApplied(t, svc, 5)
	if st := svc.Stats(); st.Sensors != 2 {
		t.Errorf("sensors after a reading of qm//u1.steam.pt-102: %d, want 2", st.Sensors)
	}
}

// TestMQTT_Users checks MQTT clients authenticate as the embedded
// server's users and keep their role's permissions: no credentials are
// refused, a publisher's readings of its sensors arrive, others not.
func TestMQTT_Users(t *testing.T) {
	env := map[string]string{"QM_PLANT_PASSWORD": "plant-4Zr7"}
	b, svc := mqttService(t, []ingest.BusUser{{User: "qm-plant", PasswordEnv: "QM_PLANT_PASSWORD", Role: ingest.RolePublisher, Sensors: []string{"qm.u1.>"}}}, env)
	if _, err := mqttClient(t, b.MQTTAddr(), "anon", "", ""); err == nil {
		t.Error("MQTT client without credentials accepted")
	}
	if _, err := mqttClient(t, b.MQTTAddr(), "wrong", "qm-plant", "nope"); err == nil {
		t.Error("MQTT client with a wrong password accepted")
	}
	c, err := mqttClient(t, b.MQTTAddr(), "plant", "qm-plant", "plant-4Zr7")
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Now().Add(-time.Hour)
	data := ingest.AppendReading(nil, ingest.Decoded{Reading: rolling.Reading{UnixNano: t0.UnixNano(), Value: 1}})
	// Outside its sensors first: at QoS 1 nats-server still acknowledges
	// (the acknowledgement comes from the bus), but nothing arrives.
	_ = mqttPublish(t, c, "driftfit/in/qm/u2/steam/pt-101", 1, data)
	if err := mqttPublish(t, c, "driftfit/in/qm/u1/steam/pt-101", 1, data); err != nil {
		t.Fatal(err)
	}
	waitApplied(t, svc, 1)
	time.Sleep(200 * time.Millisecond)
	if st := svc.Stats(); st.Applied != 1 || st.Sensors != 1 {
		t.Errorf("after one permitted and one forbidden reading: %+v, want 1 applied, 1 sensor", st)
	}
}

// TestMQTT_Version5Refused sends an MQTT 5 CONNECT by hand and checks the
// server refuses it. Packet layout from the MQTT 5.0 specification,
// section 3.1; the CONNACK return code 1 is "unacceptable protocol
// version" of MQTT 3.1.1, section 3.2.2.3.
func TestMQTT_Version5Refused(t *testing.T) {
	b, _ := mqttService(t, nil, nil)
	conn, err := net.DialTimeout("tcp", b.MQTTAddr(), 5*time.Second)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	body := []byte{0, 4, 'M', 'Q', 'T', 'T', 5, 0x02, 0, 60, 0 /* properties */, 0, 1, 'x'}
	if _, err := conn.Write(append([]byte{0x10, byte(len(body))}, body...)); err != nil {
		t.Fatal(err)
	}
	_ = conn.SetReadDeadline(time.Now().Add(5 * time.Second))
	r := bufio.NewReader(conn)
	var got []byte
	for range 4 {
		c, err := r.ReadByte()
		if err != nil {
			break
		}
		got = append(got, c)
	}
	// CONNACK (0x20), remaining length 2, no session, return code 1.
	if want := []byte{0x20, 2, 0, 1}; !bytes.Equal(got, want) {
		t.Fatalf("MQTT 5 CONNECT answered %x, want CONNACK refused %x", got, want)
	}
}
