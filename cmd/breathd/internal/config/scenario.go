package config

import (
	"errors"
	"fmt"
	"io/fs"
	"os"

	"breathd/mechanics/lungsim"
)

// LoadScenario reads a scenario file (configs/scenarios/README.md).
func LoadScenario(path string) (lungsim.Scenario, error) {
	var sc lungsim.Scenario
	data, err := os.ReadFile(path)
	if err != nil {
		if errors.Is(err, os.ErrNotExist) {
			return sc, fmt.Errorf("scenario file %s: %w (see configs/scenarios/)", path, fs.ErrNotExist)
		}
		return sc, fmt.Errorf("scenario file: %w", err)
	}
	f, err := decodeStrict(path, data, &sc)
	if err != nil {
		return sc, err
	}
	sc.Defaults()
	err = sc.Validate()
	var pe *lungsim.PathError
	if errors.As(err, &pe) {
		err = &FieldError{Path: pe.Path, Err: pe.Err} // so that it carries a line number
	}
	return sc, f.explain(err)
}
