//go:build linux

package can

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

// Linux struct can_frame layout (include/uapi/linux/can.h): 32-bit can_id
// with flag bits, 8-bit length, 3 bytes padding/reserved, 8 data bytes.
const (
	canFrameSize = 16
	canEFFFlag   = 0x80000000
	canRTRFlag   = 0x40000000
	canERRFlag   = 0x20000000
)

// SocketCAN is a Bus over a Linux raw CAN socket (PF_CAN, SOCK_RAW, CAN_RAW)
// bound to one interface. Error frames are not received (the kernel default).
// Other sockets on the same host see the frames it sends (kernel loopback);
// it does not receive its own.
type SocketCAN struct {
	ifname string
	f      *os.File
	rmu    sync.Mutex // one reader manipulates the read deadline at a time
	wmu    sync.Mutex
	once   sync.Once
}

// DialSocketCAN opens a raw CAN socket on interface ifname (e.g. "can0", "vcan0").
// Where the kernel has no AF_CAN (socket gives EAFNOSUPPORT) the error wraps
// both errors.ErrUnsupported and the errno.
func DialSocketCAN(ifname string) (*SocketCAN, error) {
	fd, err := unix.Socket(unix.AF_CAN, unix.SOCK_RAW|unix.SOCK_NONBLOCK|unix.SOCK_CLOEXEC, unix.CAN_RAW)
	if err != nil {
		if errors.Is(err, unix.EAFNOSUPPORT) || errors.Is(err, unix.EPROTONOSUPPORT) {
			return nil, fmt.Errorf("can: socketcan %s: kernel has no AF_CAN raw sockets (modules can, can-raw): %w: %w", ifname, errors.ErrUnsupported, err)
		}
		return nil, fmt.Errorf("can: socketcan %s: socket: %w", ifname, err)
	}
	ifi, err := net.InterfaceByName(ifname)
	if err != nil {
		_ = unix.Close(fd)
		return nil, fmt.Errorf("can: socketcan %s: %w", ifname, err)
	}
	if err := unix.Bind(fd, &unix.SockaddrCAN{Ifindex: ifi.Index}); err != nil {
		_ = unix.Close(fd)
		return nil, fmt.Errorf("can: socketcan %s: bind: %w", ifname, err)
	}
	return &SocketCAN{ifname: ifname, f: os.NewFile(uintptr(fd), "can:"+ifname)}, nil
}

// Send writes f to the interface. When the interface's transmit queue is full
// (ENOBUFS) it retries every 100 µs until ctx ends.
func (s *SocketCAN) Send(ctx context.Context, f Frame) error {
	if err := f.Validate(); err != nil {
		return err
	}
	var buf [canFrameSize]byte
	encodeLinuxFrame(&buf, &f)
	s.wmu.Lock()
	defer s.wmu.Unlock()
	for {
		if err := ctx.Err(); err != nil {
			return err
		}
		_, err := s.f.Write(buf[:])
		if err == nil {
			return nil
		}
		if errors.Is(err, os.ErrClosed) {
			return ErrClosed
		}
		if !errors.Is(err, unix.ENOBUFS) {
			return fmt.Errorf("can: socketcan %s: send %v: %w", s.ifname, f, err)
		}
		select {
		case <-time.After(100 * time.Microsecond):
		case <-ctx.Done():
			return ctx.Err()
		}
	}
}

// Receive reads the next frame. Cancelling ctx unblocks it (through the
// file's read deadline) and it returns ctx.Err().
func (s *SocketCAN) Receive(ctx context.Context) (Frame, error) {
	s.rmu.Lock()
	defer s.rmu.Unlock()
	if err := ctx.Err(); err != nil {
		return Frame{}, err
	}
	if err := s.f.SetReadDeadline(time.Time{}); err != nil {
		return Frame{}, s.mapErr(err)
	}
	fired := make(chan struct{})
	stop := context.AfterFunc(ctx, func() {
		_ = s.f.SetReadDeadline(time.Unix(1, 0))
		close(fired)
	})
	defer func() {
		if !stop() {
			<-fired
		}
	}()
	var buf [canFrameSize]byte
	for {
		n, err := s.f.Read(buf[:])
		if err != nil {
			if ctx.Err() != nil {
				return Frame{}, ctx.Err()
			}
			return Frame{}, s.mapErr(err)
		}
		if n != canFrameSize {
			return Frame{}, fmt.Errorf("can: socketcan %s: short read of %d bytes, want %d", s.ifname, n, canFrameSize)
		}
		f, ok := decodeLinuxFrame(&buf)
		if !ok {
			continue // error frame or CAN FD: not ours
		}
		return f, nil
	}
}

func (s *SocketCAN) mapErr(err error) error {
	if errors.Is(err, os.ErrClosed) {
		return ErrClosed
	}
	return fmt.Errorf("can: socketcan %s: receive: %w", s.ifname, err)
}

// Close closes the socket; blocked calls return ErrClosed.
func (s *SocketCAN) Close() error {
	var err error
	s.once.Do(func() { err = s.f.Close() })
	return err
}

func encodeLinuxFrame(buf *[canFrameSize]byte, f *Frame) {
	id := f.ID
	if f.Extended {
		id |= canEFFFlag
	}
	if f.Remote {
		id |= canRTRFlag
	}
	binary.NativeEndian.PutUint32(buf[0:4], id)
	buf[4] = f.DLC
	copy(buf[8:], f.Data[:])
}

// decodeLinuxFrame converts a struct can_frame; ok is false for error frames.
func decodeLinuxFrame(buf *[canFrameSize]byte) (Frame, bool) {
	raw := binary.NativeEndian.Uint32(buf[0:4])
	if raw&canERRFlag != 0 {
		return Frame{}, false
	}
	var f Frame
	f.Extended = raw&canEFFFlag != 0
	f.Remote = raw&canRTRFlag != 0
	if f.Extended {
		f.ID = raw & MaxExtendedID
	} else {
		f.ID = raw & MaxStandardID
	}
	f.DLC = buf[4]
	if f.DLC > MaxDLC {
		f.DLC = MaxDLC
	}
	if !f.Remote {
		copy(f.Data[:f.DLC], buf[8:8+int(f.DLC)])
	}
	return f, true
}
