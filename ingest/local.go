package ingest

// Filled returns o with every zero field set to its documented default,
// as New sets them, so that a caller who arranges the bus around a
// service (the stream, the subjects it reads and writes) uses the names
// the service will use. It returns New's error for options without
// Conn, DB or Sensor.
func (o Options) Filled() (Options, error) {
	err := o.fill()
	return o, err
}
