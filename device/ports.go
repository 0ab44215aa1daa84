package device

import "go.bug.st/serial/enumerator"

func enumeratePorts() ([]PortInfo, error) {
	list, err := enumerator.GetDetailedPortsList()
	if err != nil {
		return nil, err
	}
	out := make([]PortInfo, 0, len(list))
	for _, p := range list {
		out = append(out, PortInfo{Path: p.Name, USB: p.IsUSB, VID: p.VID, PID: p.PID,
			SerialNumber: p.SerialNumber, Product: p.Product})
	}
	return out, nil
}
