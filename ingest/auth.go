package ingest

import (
	"crypto/rand"
	"encoding/hex"
	"fmt"
	"net"
	"strings"

	"github.com/nats-io/nats-server/v2/server"
)

// Role is what a user of the bus may do. Every request that changes the
// service's state arrives on a subject that names what it changes (a
// calibration on <calibration prefix>.<sensor id>), so NATS subject
// permissions decide who may do it.
type Role string

// Roles of the embedded server's users.
const (
	// RolePublisher publishes readings of its sensors, with JetStream
	// acknowledgements.
	RolePublisher Role = "publisher"
	// RoleTechnician sends calibrations of its sensors.
	RoleTechnician Role = "technician"
	// RoleReader asks the read API and listens to alerts and tickets.
	RoleReader Role = "reader"
	// RoleService is the service itself: it takes readings and
	// calibrations, answers the read API, publishes alerts, tickets and
	// rejected readings, and runs the JetStream stream and consumer.
	RoleService Role = "service"
)

// Roles lists the roles a configured user may have (RoleService is made
// internally).
var Roles = []Role{RolePublisher, RoleTechnician, RoleReader}

// BusSubjects are the subjects the permissions of the roles are built
// from, as the service is configured.
type BusSubjects struct {
	Readings     string // prefix of readings: "<Readings>.<sensor id>"
	Rejected     string // subject of rejected readings
	Alerts       string // prefix of alert subjects
	Tickets      string // subject of tickets
	Calibrations string // prefix of calibration subjects
	API          string // prefix of the read API's subjects ("driftfit.api")
	Stream       string // JetStream stream of the readings
}

// inbox is where NATS clients take replies by default (nats.go's
// _INBOX prefix): JetStream acknowledgements and the service's answers.
const inbox = "_INBOX.>"

// RolePermissions returns the NATS permissions of role over subjects.
// sensors are the sensor-id patterns (NATS wildcards * and >) a
// publisher or technician covers; empty means every sensor. The README's
// "Who may do what" configuration says the same for an external server.
func RolePermissions(role Role, sensors []string, s BusSubjects) (*server.Permissions, error) {
	if len(sensors) == 0 {
		sensors = []string{">"}
	}
	under := func(prefix string) []string {
		out := make([]string, len(sensors))
		for i, p := range sensors {
			out[i] = prefix + "." + p
		}
		return out
	}
	perm := func(pub, sub []string) *server.Permissions {
		return &server.Permissions{
			Publish:   &server.SubjectPermission{Allow: pub},
			Subscribe: &server.SubjectPermission{Allow: sub},
		}
	}
	switch role {
	case RolePublisher:
		return perm(under(s.Readings), []string{inbox}), nil
	case RoleTechnician:
		return perm(under(s.Calibrations), []string{inbox}), nil
	case RoleReader:
		return perm([]string{s.API + ".>"}, []string{inbox, s.Alerts + ".>", s.Tickets}), nil
	case RoleService:
		return perm(
			[]string{"$JS.API.>", "$JS.ACK." + s.Stream + ".>", s.Rejected, s.Alerts + ".>", s.Tickets, inbox},
			[]string{s.Readings + ".>", s.Calibrations + ".>", s.API + ".>", inbox},
		), nil
	}
	return nil, fmt.Errorf("%w: %q (want publisher, technician or reader)", ErrRole, role)
}

// BusUser is a user of the embedded server.
type BusUser struct {
	User string
	// PasswordEnv names the environment variable holding the password;
	// an empty or unset variable stops Connect.
	PasswordEnv string
	Role        Role
	// Sensors are the sensor-id patterns of a publisher or technician
	// (NATS wildcards); empty means every sensor.
	Sensors []string
}

// ServiceUser is the name of the embedded server's own user, made at
// start with a random password and used only in process.
const ServiceUser = "driftfit-service"

// serverUsers builds the embedded server's users, the service's own
// first, and returns its password.
func serverUsers(o BusOptions) ([]*server.User, string, error) {
	if len(o.Users) == 0 {
		return nil, "", nil
	}
	var raw [24]byte
	if _, err := rand.Read(raw[:]); err != nil {
		return nil, "", fmt.Errorf("ingest: service password: %w", err)
	}
	pw := hex.EncodeToString(raw[:])
	// The service's own connection never leaves the process, and the demo
	// feed publishes readings through it: no permissions to narrow.
	users := []*server.User{{Username: ServiceUser, Password: pw}}
	seen := map[string]bool{ServiceUser: true}
	for i, u := range o.Users {
		if u.User == "" || seen[u.User] {
			return nil, "", fmt.Errorf("%w: users[%d] user %q: empty, repeated or reserved", ErrRole, i, u.User)
		}
		seen[u.User] = true
		perm, err := RolePermissions(u.Role, u.Sensors, o.Subjects)
		if err != nil {
			return nil, "", fmt.Errorf("ingest: users[%d] (%s): %w", i, u.User, err)
		}
		secret := ""
		if u.PasswordEnv != "" {
			secret = o.Getenv(u.PasswordEnv)
		}
		if secret == "" {
			return nil, "", fmt.Errorf("%w: users[%d] (%s): environment variable %q is empty or not set", ErrNoPassword, i, u.User, u.PasswordEnv)
		}
		users = append(users, &server.User{Username: u.User, Password: secret, Permissions: perm})
	}
	return users, pw, nil
}

// beyondLoopback reports whether host is reachable from other machines:
// anything but a loopback address or "localhost" (empty and 0.0.0.0 are
// every interface).
func beyondLoopback(host string) bool {
	if strings.EqualFold(host, "localhost") {
		return false
	}
	ip := net.ParseIP(host)
	return ip == nil || !ip.IsLoopback()
}
