// Package isotp implements ISO 15765-2 (ISO-TP, DoCAN transport layer) in
// user space over any can.Bus, with normal addressing on classical CAN:
// single frames (SF), first frames (FF, 12-bit and escaped 32-bit lengths),
// consecutive frames (CF) and flow control (FC: ContinueToSend, Wait,
// Overflow), block size and STmin honoured when sending and announced when
// receiving, N_Bs and N_Cr timeouts, and padding.
//
// Receiver is the reassembly state machine for one sender, fed frames and
// allocation-free in steady state. Conn runs Receivers (one per responding
// CAN ID, so the replies of several ECUs to a functional request reassemble
// side by side) and a sender over a can.Bus. On Linux, DialKernel opens the
// kernel's own CAN_ISOTP socket, which offers the same Send/Receive shape.
//
// The sender applies each FC to its own state as the FC arrives: an FC it
// is not waiting for (between sends, or in the middle of a block) is
// ignored and counted in Stats.UnexpectedFC, and no burst of FC Wait frames
// can crowd out the CTS behind it. A reception abandoned for a new message
// from the same sender is reported (ErrInterrupted) and counted in
// Stats.Interrupted, also when the new FF is refused as too long.
//
// Facts used here are from ISO 15765-2:2016 (Tables 8–21, §9.6.5.5, §9.7,
// §10.4.2) and, for the OBD timing preset, ISO 15765-4.
package isotp
