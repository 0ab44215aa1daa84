//go:build race

package mechanics_test

const raceEnabled = true
