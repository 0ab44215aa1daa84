module breathd

go 1.26

require (
	github.com/creack/pty v1.1.24
	github.com/mattn/go-isatty v0.0.24
	github.com/rs/zerolog v1.35.1
	go.bug.st/serial v1.8.0
	go.yaml.in/yaml/v3 v3.0.6
)

require (
	github.com/mattn/go-colorable v0.1.14 // indirect
	golang.org/x/sys v0.43.0 // indirect
)
