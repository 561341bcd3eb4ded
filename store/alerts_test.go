package store_test

import (
	"fmt"
	"testing"
	"time"

	"driftfit/store"
)

func TestDB_WriteAlerts(t *testing.T) {
	db := openDB(t, tempPath(t))
	t0 := time.Date(2026, 8, 1, 0, 0, 0, 0, time.UTC)
	err := db.WriteAlerts([]store.AlertWrite{
		{Sensor: "qm.u1.steam.pt-102", State: []byte("s1"),
			Events:  []store.TimedValue{{At: t0.Add(time.Hour), Data: []byte("e2")}, {At: t0, Data: []byte("e1")}},
			Tickets: map[string][]byte{"qm.u1.steam.pt-102@1": []byte("t1")},
			Outbox:  [][]byte{[]byte("o1"), []byte("o2")}},
		{Sensor: "qm.u2.feed.tt-201", State: []byte("s2"), Events: []store.TimedValue{{At: t0, Data: []byte("e3")}}},
	})
	if err != nil {
		t.Fatal(err)
	}
	db = reopen(t, db)
	var got []string
	_ = db.AlertStates(func(id string, s []byte) error { got = append(got, id+"="+string(s)); return nil })
	_ = db.Events(t0, t0.Add(time.Hour), func(at time.Time, d []byte) error {
		got = append(got, fmt.Sprintf("%s@%d", d, at.Sub(t0)/time.Hour))
		return nil
	})
	_ = db.Tickets(func(id string, d []byte) error { got = append(got, id+"="+string(d)); return nil })
	items, err := db.Outbox(10)
	if err != nil || len(items) != 2 || string(items[0].Data) != "o1" {
		t.Fatalf("Outbox = %v, %v", items, err)
	}
	if err := db.OutboxDone(items[0].Seq); err != nil {
		t.Fatal(err)
	}
	items, _ = db.Outbox(10)
	want := fmt.Sprint([]string{"qm.u1.steam.pt-102=s1", "qm.u2.feed.tt-201=s2", "e1@0", "e3@0", "qm.u1.steam.pt-102@1=t1"})
	if fmt.Sprint(got) != want || len(items) != 1 || string(items[0].Data) != "o2" {
		t.Errorf("read back %v, outbox %v; want %v and [o2]", got, items, want)
	}
}
