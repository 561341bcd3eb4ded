// Package chart holds what the pictures of a sensor share, on the web
// pages and in the files history --plot draws: robust value axes, the
// colour palette, the judged and trend models of an alert rule, and the
// calibrations a picture shows (made from the calibration records by
// query.CalibrationsAt, or read back from stored tickets and events
// where there are none). Whether a window is judged is the alert
// package's to say (alert.Judge). It is pure: no I/O, no clock.
package chart
