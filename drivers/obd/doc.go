// Package obd reads an engine ECU over OBD-II on CAN: SAE J1979 (ISO 15031-5)
// services 01, 02, 03, 07 and 09, and ISO 14229-1 service 22 (ReadDataByIdentifier)
// for user-defined identifiers, addressed per ISO 15765-4.
//
// # Read-only by construction
//
// The ECU is read-only. A Request can only be built by the constructors
// CurrentData, FreezeFrame, StoredDTCs, PendingDTCs, VehicleInfo and ReadDID; its
// service byte has an unexported type whose only values are the six read
// services, and no exported function accepts a service byte. Clearing codes
// (service 04), writing, routines, security access and session changes cannot be
// expressed. The zero Request encodes to an error, never to a byte. Tests in
// readonly_test.go enforce this over the package's own syntax tree.
//
// # Transport
//
// The package does not talk to CAN itself. The Poller uses a Transport: one
// ISO-TP message path to the bus, which the caller builds on an ISO-TP
// implementation. See Transport for the contract.
//
// # Units
//
// Every decoded value is in Plenum's canonical unit: pascals (not kPa), degrees
// Celsius, ratio 0–1 (not percent), kg/s (not g/s), rpm, m/s, seconds, volts,
// amperes, m³/s. Channel names are Plenum's own, prefixed "ecu_".
package obd
