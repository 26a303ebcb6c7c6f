//! A serial port that keeps a transcript of the bytes sent and received, for `try-link`: an
//! engineer describing a new meter sees the raw exchange under each request.

use serialport::{ClearBuffer, DataBits, FlowControl, Parity, SerialPort, StopBits};
use std::io::{self, Read, Write};
use std::sync::{Arc, Mutex};
use std::time::Duration;

/// Which way bytes went.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Direction {
    Sent,
    Received,
}

/// The bytes that went each way, in order, runs of one direction joined.
pub type Transcript = Vec<(Direction, Vec<u8>)>;

/// Where a tapped port writes its transcript; the reader takes it exchange by exchange.
#[derive(Clone, Default)]
pub struct Recorder(Arc<Mutex<Transcript>>);

impl Recorder {
    fn note(&self, direction: Direction, bytes: &[u8]) {
        if bytes.is_empty() {
            return;
        }
        let mut t = self.0.lock().unwrap_or_else(|p| p.into_inner());
        match t.last_mut() {
            Some((d, run)) if *d == direction => run.extend_from_slice(bytes),
            _ => t.push((direction, bytes.to_vec())),
        }
    }

    /// The transcript since the last call.
    pub fn take(&self) -> Transcript {
        std::mem::take(&mut *self.0.lock().unwrap_or_else(|p| p.into_inner()))
    }
}

/// A port whose traffic is recorded. Input thrown away by `clear` is read first, so that it
/// shows in the transcript (a late reply, a log line, a prompt).
pub struct TappedPort {
    inner: Box<dyn SerialPort>,
    recorder: Recorder,
}

impl TappedPort {
    pub fn new(inner: Box<dyn SerialPort>, recorder: Recorder) -> TappedPort {
        TappedPort { inner, recorder }
    }
}

impl Read for TappedPort {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.recorder.note(Direction::Received, &buf[..n]);
        Ok(n)
    }
}

impl Write for TappedPort {
    fn write(&mut self, buf: &[u8]) -> io::Result<usize> {
        let n = self.inner.write(buf)?;
        self.recorder.note(Direction::Sent, &buf[..n]);
        Ok(n)
    }
    fn flush(&mut self) -> io::Result<()> {
        self.inner.flush()
    }
}

impl SerialPort for TappedPort {
    fn name(&self) -> Option<String> {
        self.inner.name()
    }
    fn baud_rate(&self) -> serialport::Result<u32> {
        self.inner.baud_rate()
    }
    fn data_bits(&self) -> serialport::Result<DataBits> {
        self.inner.data_bits()
    }
    fn flow_control(&self) -> serialport::Result<FlowControl> {
        self.inner.flow_control()
    }
    fn parity(&self) -> serialport::Result<Parity> {
        self.inner.parity()
    }
    fn stop_bits(&self) -> serialport::Result<StopBits> {
        self.inner.stop_bits()
    }
    fn timeout(&self) -> Duration {
        self.inner.timeout()
    }
    fn set_baud_rate(&mut self, baud_rate: u32) -> serialport::Result<()> {
        self.inner.set_baud_rate(baud_rate)
    }
    fn set_data_bits(&mut self, data_bits: DataBits) -> serialport::Result<()> {
        self.inner.set_data_bits(data_bits)
    }
    fn set_flow_control(&mut self, flow_control: FlowControl) -> serialport::Result<()> {
        self.inner.set_flow_control(flow_control)
    }
    fn set_parity(&mut self, parity: Parity) -> serialport::Result<()> {
        self.inner.set_parity(parity)
    }
    fn set_stop_bits(&mut self, stop_bits: StopBits) -> serialport::Result<()> {
        self.inner.set_stop_bits(stop_bits)
    }
    fn set_timeout(&mut self, timeout: Duration) -> serialport::Result<()> {
        self.inner.set_timeout(timeout)
    }
    fn write_request_to_send(&mut self, level: bool) -> serialport::Result<()> {
        self.inner.write_request_to_send(level)
    }
    fn write_data_terminal_ready(&mut self, level: bool) -> serialport::Result<()> {
        self.inner.write_data_terminal_ready(level)
    }
    fn read_clear_to_send(&mut self) -> serialport::Result<bool> {
        self.inner.read_clear_to_send()
    }
    fn read_data_set_ready(&mut self) -> serialport::Result<bool> {
        self.inner.read_data_set_ready()
    }
    fn read_ring_indicator(&mut self) -> serialport::Result<bool> {
        self.inner.read_ring_indicator()
    }
    fn read_carrier_detect(&mut self) -> serialport::Result<bool> {
        self.inner.read_carrier_detect()
    }
    fn bytes_to_read(&self) -> serialport::Result<u32> {
        self.inner.bytes_to_read()
    }
    fn bytes_to_write(&self) -> serialport::Result<u32> {
        self.inner.bytes_to_write()
    }
    fn clear(&self, buffer_to_clear: ClearBuffer) -> serialport::Result<()> {
        if matches!(buffer_to_clear, ClearBuffer::Input | ClearBuffer::All)
            && let Ok(mut clone) = self.inner.try_clone()
        {
            // What is about to be thrown away is shown as received.
            let mut buf = [0u8; 512];
            let _ = clone.set_timeout(Duration::from_millis(0));
            while let Ok(n) = clone.read(&mut buf) {
                if n == 0 {
                    break;
                }
                self.recorder.note(Direction::Received, &buf[..n]);
            }
            let _ = clone.set_timeout(self.inner.timeout());
        }
        self.inner.clear(buffer_to_clear)
    }
    fn try_clone(&self) -> serialport::Result<Box<dyn SerialPort>> {
        self.inner.try_clone()
    }
    fn set_break(&self) -> serialport::Result<()> {
        self.inner.set_break()
    }
    fn clear_break(&self) -> serialport::Result<()> {
        self.inner.clear_break()
    }
}
