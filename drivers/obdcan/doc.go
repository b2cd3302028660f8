// Package obdcan carries the obd package's requests and responses over
// ISO-TP (drivers/isotp) on a CAN bus (drivers/can), as ISO 15765-4 lays the
// identifiers out: requests on 0x7DF / 0x7E0+n (11-bit) or 0x18DB33F1 /
// 0x18DAxxF1 (29-bit), responses on 0x7E8+n or 0x18DAF1xx.
//
// A Transport is the obd.Transport a Poller needs:
//
//	tr, err := obdcan.New(bus, obd.ID11)
//	p, err := obd.NewPoller(obd.Config{Transport: tr, Format: obd.ID11, …})
//
// A Source is the pipeline's OBD input: it registers the polled channels,
// runs a Poller over a Transport and hands each answer's readings to a Sink
// as one frame; Report gives its health at scrape time.
//
//	src, err := obdcan.NewSource(bus, reg, obdcan.Config{Name: "ecu", Format: obd.ID11, Channels: …})
//	err = src.Run(ctx, sink)
package obdcan
