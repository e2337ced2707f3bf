"""Where sound comes from: 16-bit samples and levels, the ring, the windower, the sources.

Owns: `samples` (PCM conversion, AES17 levels, clipping, down-mix), `ringbuffer` (the
single-producer / single-consumer float32 ring with overrun and gap counts), `windower`
(windows every hop of a stream or a signal in memory), `sources` (the file and microphone
sources with their threads, stream resampling with soxr, the one file-to-model-rate path,
the device table).
May import: ``monitor.base``.
"""
