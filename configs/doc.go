// Package configs decodes, checks and explains the YAML configuration of
// "driftfit serve" and "driftfit check-config".
//
// # Overview
//
// Load (or Parse) decodes a file strictly: every unknown key, wrongly typed
// value and failed check is reported, all at once, each as a *FieldError
// with the file, line, column, field path and offending value. Defaults are
// then filled in one place, and Validate checks ranges and cross-field
// rules and converts tolerances and limits to canonical units. The result
// is read-only and safe for concurrent use; cmd maps it onto each package's
// Options. This package imports nothing else of driftfit.
//
// # File layout
//
//	bus:       NATS servers (none: embedded server), subjects, delivery mode,
//	           payload and clock-skew bounds, auth by reference, TLS files
//	store:     data directory, commit interval and size, history retention
//	http:      listen address of metrics and pages, bearer token by reference
//	defaults:  windows inherited by classes
//	classes:   sensor classes matched by id pattern: unit, span, tolerance,
//	           windows, trend model, evidence rules, limits
//	sensors:   per-sensor settings keyed by exact id: class pin, as-left
//	           value, peer group, and any class field
//	groups:    peer groups of sensors measuring the same quantity
//	tickets:   webhook that also receives recalibration tickets: URL,
//	           per-attempt timeout, retry backoff cap, auth by reference
//
// configs/demo.yaml is a complete, commented example.
//
// # Durations, quantities and rates
//
// Durations are strings in Go syntax plus "d" (24 h) and "w" (7 d): "200ms",
// "1d", "400d"; see ParseDuration. Quantities carry their unit: "0.5 kPa",
// "0.25 %span" (percent of the class's upper minus lower range value).
// Rates add a time unit: "0.2 kPa/day", "0.05 %span/month", "1 degC/year";
// curvature adds "^2": "0.01 kPa/day^2". Time units are s, min, h, d (day),
// week, month (mean Gregorian month, 30.436875 d) and year (365.2425 d).
// Units containing a slash are fine: "0.3 mm/s/month". A unit must equal
// the class unit exactly or be "%span"; anything else is an error.
// Canonical forms are the class unit (tolerance), unit per day (slope) and
// unit per day² (curvature).
//
// # Patterns
//
// Class matches and group members are sensor id patterns where "*" matches
// any run of characters and "?" one character, both within one
// dot-separated token. Patterns of two classes that could both match some
// id are an error, reported with an example id.
//
// # Credentials
//
// Secrets never appear in the file: it names the environment variable
// (password_env, token_env, tickets.webhook.header_env) or the credentials
// file (creds_file). A password inside a server or webhook URL is an error,
// and Explain and error messages mask it, as well as the query values of a
// webhook URL. This package never reads those variables.
package configs
