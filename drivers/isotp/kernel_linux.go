//go:build linux

package isotp

import (
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"net"
	"os"
	"sync"
	"time"

	"golang.org/x/sys/unix"
)

// Linux can-isotp socket options (include/uapi/linux/can/isotp.h); x/sys/unix lacks them.
const (
	solCANISOTP    = unix.SOL_CAN_BASE + unix.CAN_ISOTP // 106
	canISOTPOpts   = 1                                  // struct can_isotp_options
	canISOTPRecvFC = 2                                  // struct can_isotp_fc_options
	isotpTxPadding = 0x004
	canEFFFlag     = 0x80000000
)

// KernelConfig configures a kernel CAN_ISOTP socket.
type KernelConfig struct {
	// TxID is the ID the socket sends on, RxID the ID it receives on (the
	// socket's own point of view). Extended selects 29-bit IDs.
	TxID, RxID uint32
	Extended   bool
	// BlockSize, STmin and MaxWaits are announced in the kernel's FC frames
	// (struct can_isotp_fc_options bs, stmin, wftmax).
	BlockSize uint8
	STmin     time.Duration
	MaxWaits  uint8
	// Padding: PadDefault/PadWith pad transmitted frames to DLC 8
	// (CAN_ISOTP_TX_PADDING); PadNone lets the kernel shorten them.
	Padding  PadMode
	PadValue byte
	// BufferSize is the largest message Receive returns (default 8200).
	BufferSize int
}

// KernelConn is an ISO-TP link through the Linux kernel's CAN_ISOTP socket;
// it has the same Send/Receive shape as Conn.
type KernelConn struct {
	cfg  KernelConfig
	f    *os.File
	rmu  sync.Mutex
	once sync.Once
}

// DialKernel opens a CAN_ISOTP socket on ifname. Options are set before
// bind, as the kernel requires (after bind it answers EISCONN). Where the
// kernel has no AF_CAN or no can-isotp, the error wraps errors.ErrUnsupported.
func DialKernel(ifname string, cfg KernelConfig) (*KernelConn, error) {
	stmin, err := EncodeSTmin(cfg.STmin)
	if err != nil {
		return nil, fmt.Errorf("isotp: kernel socket config: %w", err)
	}
	if cfg.BufferSize <= 0 {
		cfg.BufferSize = 8200
	}
	fd, err := unix.Socket(unix.AF_CAN, unix.SOCK_DGRAM|unix.SOCK_NONBLOCK|unix.SOCK_CLOEXEC, unix.CAN_ISOTP)
	if err != nil {
		if errors.Is(err, unix.EAFNOSUPPORT) || errors.Is(err, unix.EPROTONOSUPPORT) {
			return nil, fmt.Errorf("isotp: kernel socket on %s: no AF_CAN/CAN_ISOTP in this kernel (module can-isotp): %w: %w", ifname, errors.ErrUnsupported, err)
		}
		return nil, fmt.Errorf("isotp: kernel socket on %s: %w", ifname, err)
	}
	fail := func(what string, err error) (*KernelConn, error) {
		_ = unix.Close(fd)
		return nil, fmt.Errorf("isotp: kernel socket on %s: %s: %w", ifname, what, err)
	}
	// struct can_isotp_options { u32 flags; u32 frame_txtime; u8 ext_address;
	// u8 txpad_content; u8 rxpad_content; u8 rx_ext_address; }
	var opts [12]byte
	pad := DefaultPadding
	if cfg.Padding == PadWith {
		pad = cfg.PadValue
	}
	if cfg.Padding != PadNone {
		binary.NativeEndian.PutUint32(opts[0:4], isotpTxPadding)
	}
	opts[9], opts[10] = pad, pad
	if err := unix.SetsockoptString(fd, solCANISOTP, canISOTPOpts, string(opts[:])); err != nil {
		return fail("set CAN_ISOTP_OPTS", err)
	}
	fc := [3]byte{cfg.BlockSize, stmin, cfg.MaxWaits}
	if err := unix.SetsockoptString(fd, solCANISOTP, canISOTPRecvFC, string(fc[:])); err != nil {
		return fail("set CAN_ISOTP_RECV_FC", err)
	}
	ifi, err := net.InterfaceByName(ifname)
	if err != nil {
		return fail("interface", err)
	}
	tx, rx := cfg.TxID, cfg.RxID
	if cfg.Extended {
		tx, rx = tx|canEFFFlag, rx|canEFFFlag
	}
	if err := unix.Bind(fd, &unix.SockaddrCAN{Ifindex: ifi.Index, TxID: tx, RxID: rx}); err != nil {
		return fail("bind", err)
	}
	return &KernelConn{cfg: cfg, f: os.NewFile(uintptr(fd), "isotp:"+ifname)}, nil
}

// Send writes payload as one ISO-TP message; the kernel does the framing.
func (k *KernelConn) Send(ctx context.Context, payload []byte) error {
	if len(payload) == 0 {
		return errors.New("isotp: kernel send: empty payload")
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	stop := context.AfterFunc(ctx, func() { _ = k.f.SetWriteDeadline(time.Unix(1, 0)) })
	defer func() { stop(); _ = k.f.SetWriteDeadline(time.Time{}) }()
	if _, err := k.f.Write(payload); err != nil {
		if ctx.Err() != nil {
			return ctx.Err()
		}
		if errors.Is(err, os.ErrClosed) {
			return ErrClosed
		}
		return fmt.Errorf("isotp: kernel send of %d bytes on %X: %w", len(payload), k.cfg.TxID, err)
	}
	return nil
}

// Receive returns the next reassembled message from RxID.
func (k *KernelConn) Receive(ctx context.Context) (Message, error) {
	k.rmu.Lock()
	defer k.rmu.Unlock()
	if err := ctx.Err(); err != nil {
		return Message{}, err
	}
	_ = k.f.SetReadDeadline(time.Time{})
	fired := make(chan struct{})
	stop := context.AfterFunc(ctx, func() { _ = k.f.SetReadDeadline(time.Unix(1, 0)); close(fired) })
	defer func() {
		if !stop() {
			<-fired
		}
	}()
	buf := make([]byte, k.cfg.BufferSize)
	n, err := k.f.Read(buf)
	if err != nil {
		if ctx.Err() != nil {
			return Message{}, ctx.Err()
		}
		if errors.Is(err, os.ErrClosed) {
			return Message{}, ErrClosed
		}
		return Message{}, fmt.Errorf("isotp: kernel receive on %X: %w", k.cfg.RxID, err)
	}
	return Message{ID: k.cfg.RxID, Payload: buf[:n:n]}, nil
}

// Close closes the socket.
func (k *KernelConn) Close() error {
	var err error
	k.once.Do(func() { err = k.f.Close() })
	return err
}
