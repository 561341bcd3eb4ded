package configs

import (
	"errors"
	"fmt"
	"os"
)

// Load reads and parses the configuration file at path. See Parse.
func Load(path string) (*Config, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("configs: read %s: %w", path, err)
	}
	return Parse(path, data)
}

// Parse decodes data strictly, applies defaults and validates. name is the
// file name used in error messages. Unknown keys, wrong types and every
// validation problem are reported together, sorted by line, joined with
// errors.Join; each is a *FieldError. On error the Config is nil.
//
// YAML anchors, aliases and merge keys ("<<: *base") are supported; only one
// document is allowed.
func Parse(name string, data []byte) (*Config, error) {
	c, d, err := decode(name, data)
	if err != nil {
		return nil, err
	}
	c.applyDefaults()
	errs := d.errs
	if err := c.validate(d.bad); err != nil {
		errs = append(errs, unjoin(err)...)
	}
	if len(errs) > 0 {
		sortErrors(errs)
		return nil, errors.Join(errs...)
	}
	return c, nil
}

func unjoin(err error) []error {
	if j, ok := err.(interface{ Unwrap() []error }); ok {
		return j.Unwrap()
	}
	return []error{err}
}
