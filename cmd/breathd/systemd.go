package main

import (
	"time"

	"github.com/coreos/go-systemd/v22/daemon"
	"github.com/rs/zerolog"
)

// notifySystemd tells systemd (Type=notify) that breathd is ready and, if
// the unit has WatchdogSec, pings the watchdog at half its interval. It
// does nothing outside systemd. The returned func reports stopping.
func notifySystemd(log zerolog.Logger) func() {
	if ok, err := daemon.SdNotify(false, daemon.SdNotifyReady); err != nil {
		log.Warn().Err(err).Msg("could not notify systemd")
	} else if !ok {
		return func() {}
	}
	done := make(chan struct{})
	if every, err := daemon.SdWatchdogEnabled(false); err == nil && every > 0 {
		go func() {
			t := time.NewTicker(every / 2)
			defer t.Stop()
			for {
				select {
				case <-done:
					return
				case <-t.C:
					daemon.SdNotify(false, daemon.SdNotifyWatchdog)
				}
			}
		}()
	}
	return func() {
		close(done)
		daemon.SdNotify(false, daemon.SdNotifyStopping)
	}
}
