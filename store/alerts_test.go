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
			Outbox:  []store.OutboxItem{{Lane: 1, Data: []byte("o1")}, {Lane: 1, Data: []byte("o2")}}},
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
	items, err := db.Outbox(1, 0, 10)
	if err != nil || len(items) != 2 || string(items[0].Data) != "o1" {
		t.Fatalf("Outbox = %v, %v", items, err)
	}
	if err := db.OutboxDone(1, items[0].Seq); err != nil {
		t.Fatal(err)
	}
	items, _ = db.Outbox(1, 0, 10)
	want := fmt.Sprint([]string{"qm.u1.steam.pt-102=s1", "qm.u2.feed.tt-201=s2", "e1@0", "e3@0", "qm.u1.steam.pt-102@1=t1"})
	if fmt.Sprint(got) != want || len(items) != 1 || string(items[0].Data) != "o2" {
		t.Errorf("read back %v, outbox %v; want %v and [o2]", got, items, want)
	}
}

// Alert writes put into a commit batch land with the position in one
// transaction, and the commit lists the outbox items it stored; outbox
// deletes ride on a later commit.
func TestBatch_Alerts_CommitWithPosition(t *testing.T) {
	db := openDB(t, tempPath(t))
	t0 := time.Date(2026, 8, 1, 0, 0, 0, 0, time.UTC)
	var b store.Batch
	b.SetPosition(42)
	if err := b.Alerts(store.AlertWrite{Sensor: "qm.u1.steam.pt-102", State: []byte("s1"),
		Events:  []store.TimedValue{{At: t0, Data: []byte("e1")}},
		Tickets: map[string][]byte{"qm.u1.steam.pt-102@1": []byte("t1")},
		Outbox:  []store.OutboxItem{{Lane: 2, Data: []byte("bus1")}, {Lane: 3, Data: []byte("hook1")}, {Lane: 2, Data: []byte("bus2")}},
	}); err != nil {
		t.Fatal(err)
	}
	if err := b.Alerts(store.AlertWrite{Sensor: "x", Outbox: []store.OutboxItem{{Lane: 0, Data: []byte("old")}}}); err == nil {
		t.Error("Alerts took an item of lane 0, which is kept for items of earlier versions")
	}
	st, err := db.Commit(&b)
	if err != nil {
		t.Fatal(err)
	}
	if len(st.Outbox) != 3 || string(st.Outbox[1].Data) != "hook1" || st.Outbox[1].Lane != 3 {
		t.Fatalf("CommitStats.Outbox = %+v", st.Outbox)
	}
	db = reopen(t, db)
	if pos, _ := db.Position(); pos != 42 {
		t.Errorf("position %d, want 42", pos)
	}
	bus, err := db.Outbox(2, 0, 10)
	if err != nil || len(bus) != 2 || string(bus[0].Data) != "bus1" || string(bus[1].Data) != "bus2" {
		t.Fatalf("lane 2 = %+v, %v", bus, err)
	}
	if after, _ := db.Outbox(2, bus[0].Seq, 10); len(after) != 1 || string(after[0].Data) != "bus2" {
		t.Errorf("lane 2 after %d = %+v, want [bus2]", bus[0].Seq, after)
	}
	b.OutboxDone(2, bus[0].Seq)
	if _, err := db.Commit(&b); err != nil {
		t.Fatal(err)
	}
	bus, _ = db.Outbox(2, 0, 10)
	hook, _ := db.Outbox(3, 0, 10)
	if len(bus) != 1 || string(bus[0].Data) != "bus2" || len(hook) != 1 || string(hook[0].Data) != "hook1" {
		t.Errorf("after delete: lane 2 %+v, lane 3 %+v; want [bus2] and [hook1]", bus, hook)
	}
	var states int
	_ = db.AlertStates(func(string, []byte) error { states++; return nil })
	if states != 1 {
		t.Errorf("alert states %d, want 1", states)
	}
}
