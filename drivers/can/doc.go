// Package can carries classical CAN frames (ISO 11898-1: 11-bit and 29-bit
// identifiers, 0–8 data bytes) between Plenum and a bus.
//
// A Frame is a small value type with Validate and String. A Bus is a frame
// transport shaped like net.Conn: Send and Receive take a context, cancelling
// the context unblocks a blocked call, and Close unblocks every call.
//
// Three buses are provided:
//
//   - SocketCAN (Linux raw CAN socket, DialSocketCAN). Where the kernel has no
//     AF_CAN, DialSocketCAN returns an error wrapping errors.ErrUnsupported.
//   - VirtualBus: an in-process bus with any number of nodes, a wire-time model
//     at a configured bit rate (frame length computed on the real bit stream,
//     including the CRC-15 and bit stuffing, or worst-case stuffing), one frame
//     on the wire at a time with identifier arbitration, and fault injection
//     (drop, delay, corrupt, reorder, babbling node).
//   - The kernel's CAN_ISOTP socket, as a message transport, lives in package
//     drivers/isotp (DialKernel) because it carries messages, not frames.
package can
