// Package stream is one device's loop: it reads the device's bytes, decodes
// them into samples (package lines), finds breaths and computes their
// mechanics (package mechanics), keeps the rolling window, evaluates the
// rules (package alerts), and hands every breath and event to the sinks
// (the publisher of package publish, the CSV writer of package payload).
//
// Run drives the loop until the source ends or its context is cancelled;
// Control acknowledges events and reads the counters from other
// goroutines; Status is what the loop reports. The loop keeps the order
// of the samples, never waits on a sink's network, and allocates nothing
// per sample.
//
// Every output of breathd carries Advisory, the notice that it is research
// software and not a medical device.
package stream
