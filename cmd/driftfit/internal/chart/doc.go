// Package chart holds what the pictures of a sensor share, on the web
// pages and in the files history --plot draws: robust value axes, the
// colour palette, the evidence gates and judged model of an alert rule,
// and the calibrations read back from stored tickets and events. It is
// pure: no I/O, no clock.
package chart
