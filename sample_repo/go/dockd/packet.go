// Package dockd receives status packets from Kestrune docks across Brindlemoor,
// keeps track of which docks are alive and forwards batches to the back office.
package dockd

import (
	"encoding/binary"
	"errors"
	"fmt"
	"time"
)

const (
	packetMagic = 0xB7
	packetLen   = 12

	flagBikePresent = 0x01
	flagLocked      = 0x02
	flagFault       = 0x04
	flagBackupPower = 0x08
)

// ErrChecksum is returned when the trailing XOR byte of a packet does not match.
var ErrChecksum = errors.New("dockd: packet checksum mismatch")

// DockStatus is one decoded status report from a dock.
type DockStatus struct {
	DockID        uint16
	Version       uint8
	BikePresent   bool
	Locked        bool
	Fault         bool
	OnBackupPower bool
	BatteryMV     uint16
	SentAt        time.Time
}

// DecodeStatusPacket parses the raw bytes of a dock status packet into a DockStatus.
// It verifies the length, the magic byte and the XOR checksum before reading fields.
func DecodeStatusPacket(raw []byte) (*DockStatus, error) {
	if len(raw) != packetLen {
		return nil, fmt.Errorf("dockd: expected %d bytes, got %d", packetLen, len(raw))
	}
	if raw[0] != packetMagic {
		return nil, fmt.Errorf("dockd: bad magic byte 0x%02x", raw[0])
	}
	if xorSum(raw[:packetLen-1]) != raw[packetLen-1] {
		return nil, ErrChecksum
	}
	version := raw[1]
	if version != 2 && version != 3 {
		return nil, fmt.Errorf("dockd: unsupported protocol version %d", version)
	}
	flags := raw[4]
	return &DockStatus{
		DockID:        binary.BigEndian.Uint16(raw[2:4]),
		Version:       version,
		BikePresent:   flags&flagBikePresent != 0,
		Locked:        flags&flagLocked != 0,
		Fault:         flags&flagFault != 0,
		OnBackupPower: flags&flagBackupPower != 0,
		BatteryMV:     binary.BigEndian.Uint16(raw[5:7]),
		SentAt:        time.Unix(int64(binary.BigEndian.Uint32(raw[7:11])), 0).UTC(),
	}, nil
}

func xorSum(b []byte) byte {
	var sum byte
	for _, v := range b {
		sum ^= v
	}
	return sum
}

// EncodeStatusPacket builds the wire form of a status report; the dock simulator
// used in integration tests relies on it.
func EncodeStatusPacket(s *DockStatus) []byte {
	raw := make([]byte, packetLen)
	raw[0] = packetMagic
	raw[1] = s.Version
	binary.BigEndian.PutUint16(raw[2:4], s.DockID)
	var flags byte
	if s.BikePresent {
		flags |= flagBikePresent
	}
	if s.Locked {
		flags |= flagLocked
	}
	if s.Fault {
		flags |= flagFault
	}
	if s.OnBackupPower {
		flags |= flagBackupPower
	}
	raw[4] = flags
	binary.BigEndian.PutUint16(raw[5:7], s.BatteryMV)
	binary.BigEndian.PutUint32(raw[7:11], uint32(s.SentAt.Unix()))
	raw[11] = xorSum(raw[:11])
	return raw
}

// NeedsAttention reports whether the dock signals a fault or holds a bike it failed to lock.
func (s *DockStatus) NeedsAttention() bool {
	return s.Fault || (s.BikePresent && !s.Locked)
}

// BatteryLow reports whether the backup battery reading is under the given threshold in millivolts.
func (s *DockStatus) BatteryLow(thresholdMV uint16) bool {
	return s.OnBackupPower && s.BatteryMV < thresholdMV
}
