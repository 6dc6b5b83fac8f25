//! The families `/metrics` exports from the pipeline's state: the fixed
//! ones (name, help, type, label names) and the naming of those that
//! depend on the config (band measure × quantity, overall levels ×
//! quantity, alarm limits × quantity). Both encoders read them from here.

use prometheus::proto::MetricType;

use crate::config::Measure;
use crate::units::Quantity;

#[derive(Debug, Clone, Copy)]
pub(crate) enum Fixed {
    BandPeakFrequency,
    CrestFactor,
    SamplesReceived,
    SamplesProcessed,
    SamplesDropped,
    Discontinuities,
    Blocks,
    Spectra,
    SpectrumAge,
    LastSpectrum,
    SourceUp,
    SourceFrames,
    SourceBytes,
    SourceLastFrame,
    SourceConnections,
    SourceCrcErrors,
    SourceResyncs,
    SourceSkippedBytes,
    SourceMissingSamples,
    SourceLateFrames,
    SourceRejected,
    SourceRestarts,
    BandInService,
    MachineSpeed,
    MachineSpeedKnown,
    AlarmState,
    AlarmLatched,
    AlarmAcknowledged,
    AlarmSince,
    AlarmTransitions,
    HealthOk,
    AlarmRecordsWritten,
    AlarmRecordsDropped,
    AlarmWriteErrors,
    AlarmCapturesPruned,
    AlarmLimitDimensionless,
    StorageWriteErrors,
    StorageWriteRetries,
    StorageRecordsLost,
    AlarmTimeToLimit,
    HistoryRecordsDropped,
    HistoryPointsWritten,
    HistorySpectraStored,
    HistorySpectraDeleted,
    HistoryWriteErrors,
    HistoryQueued,
    HistoryFileBytes,
}

pub(crate) const FIXED: [(Fixed, &str, &str, MetricType, &[&str]); 47] = [
    (
        Fixed::BandPeakFrequency,
        "bandwatch_band_peak_frequency_hertz",
        "Frequency of the largest line in the band of the latest spectrum.",
        MetricType::GAUGE,
        &["channel", "band"],
    ),
    (
        Fixed::CrestFactor,
        "bandwatch_channel_crest_factor",
        "Peak over RMS of the newest block, dimensionless.",
        MetricType::GAUGE,
        &["channel"],
    ),
    (
        Fixed::SamplesReceived,
        "bandwatch_channel_samples_received_total",
        "Samples accepted into the channel's ring.",
        MetricType::COUNTER,
        &["channel"],
    ),
    (
        Fixed::SamplesProcessed,
        "bandwatch_channel_samples_processed_total",
        "Samples the DSP worker consumed from the channel's ring.",
        MetricType::COUNTER,
        &["channel"],
    ),
    (
        Fixed::SamplesDropped,
        "bandwatch_channel_samples_dropped_total",
        "Samples that never reached the DSP, by reason.",
        MetricType::COUNTER,
        &["channel", "reason"],
    ),
    (
        Fixed::Discontinuities,
        "bandwatch_channel_discontinuities_total",
        "Breaks in the sample stream that reset block assembly, by reason.",
        MetricType::COUNTER,
        &["channel", "reason"],
    ),
    (
        Fixed::Blocks,
        "bandwatch_channel_blocks_total",
        "FFT blocks computed for the channel.",
        MetricType::COUNTER,
        &["channel"],
    ),
    (
        Fixed::Spectra,
        "bandwatch_channel_spectra_total",
        "Averaged spectra published for the channel.",
        MetricType::COUNTER,
        &["channel"],
    ),
    (
        Fixed::SpectrumAge,
        "bandwatch_channel_spectrum_age_seconds",
        "Seconds since the channel's latest spectrum was published.",
        MetricType::GAUGE,
        &["channel"],
    ),
    (
        Fixed::LastSpectrum,
        "bandwatch_channel_last_spectrum_timestamp_seconds",
        "Time the channel's latest spectrum was published, in seconds since the Unix epoch.",
        MetricType::GAUGE,
        &["channel"],
    ),
    (
        Fixed::SourceUp,
        "bandwatch_source_up",
        "Whether the source is connected and delivering (1) or not (0).",
        MetricType::GAUGE,
        &["source", "kind"],
    ),
    (
        Fixed::SourceFrames,
        "bandwatch_source_frames_total",
        "Frames or sample batches the source has received.",
        MetricType::COUNTER,
        &["source"],
    ),
    (
        Fixed::SourceBytes,
        "bandwatch_source_bytes_total",
        "Bytes the source has received.",
        MetricType::COUNTER,
        &["source"],
    ),
    (
        Fixed::SourceLastFrame,
        "bandwatch_source_last_frame_timestamp_seconds",
        "Time the source received its latest frame, in seconds since the Unix epoch.",
        MetricType::GAUGE,
        &["source"],
    ),
    (
        Fixed::SourceConnections,
        "bandwatch_source_connections_total",
        "Connections made or accepted, or ports opened, by the source.",
        MetricType::COUNTER,
        &["source"],
    ),
    (
        Fixed::SourceCrcErrors,
        "bandwatch_source_crc_errors_total",
        "Frames whose CRC did not match.",
        MetricType::COUNTER,
        &["source"],
    ),
    (
        Fixed::SourceResyncs,
        "bandwatch_source_resyncs_total",
        "Times the stream decoder scanned past bad bytes to the next frame.",
        MetricType::COUNTER,
        &["source"],
    ),
    (
        Fixed::SourceSkippedBytes,
        "bandwatch_source_skipped_bytes_total",
        "Bytes the decoder threw away (bad frames, junk, partial frames).",
        MetricType::COUNTER,
        &["source"],
    ),
    (
        Fixed::SourceMissingSamples,
        "bandwatch_source_missing_samples_total",
        "Sample instants lost in gaps of the frame sequence.",
        MetricType::COUNTER,
        &["source"],
    ),
    (
        Fixed::SourceLateFrames,
        "bandwatch_source_late_frames_total",
        "Frames dropped as duplicates or late arrivals.",
        MetricType::COUNTER,
        &["source"],
    ),
    (
        Fixed::SourceRejected,
        "bandwatch_source_rejected_total",
        "Frames or connections the source rejected, by reason.",
        MetricType::COUNTER,
        &["source", "reason"],
    ),
    (
        Fixed::SourceRestarts,
        "bandwatch_source_restarts_total",
        "Times the source's sample index started over, by how it was detected.",
        MetricType::COUNTER,
        &["source", "reason"],
    ),
    (
        Fixed::BandInService,
        "bandwatch_band_in_service",
        "1 when the band has a value; 0 when it cannot have one now (running speed unknown, or its edges pass Nyquist at the current speed).",
        MetricType::GAUGE,
        &["channel", "band"],
    ),
    (
        Fixed::MachineSpeed,
        "bandwatch_machine_speed_hertz",
        "Running speed of the machine (revolutions per second), while it is known.",
        MetricType::GAUGE,
        &["machine", "method"],
    ),
    (
        Fixed::MachineSpeedKnown,
        "bandwatch_machine_speed_known",
        "1 while the machine's running speed is known and fresh, else 0.",
        MetricType::GAUGE,
        &["machine", "method"],
    ),
    (
        Fixed::AlarmState,
        "bandwatch_alarm_state",
        "Alarm state: 0 normal, 1 alert, 2 danger, -1 inhibited (channel not OK).",
        MetricType::GAUGE,
        &["channel", "band"],
    ),
    (
        Fixed::AlarmLatched,
        "bandwatch_alarm_latched",
        "1 while a latching alarm holds a state until it is acknowledged, else 0.",
        MetricType::GAUGE,
        &["channel", "band"],
    ),
    (
        Fixed::AlarmAcknowledged,
        "bandwatch_alarm_acknowledged",
        "1 when the latched state has been acknowledged by an operator, else 0.",
        MetricType::GAUGE,
        &["channel", "band"],
    ),
    (
        Fixed::AlarmSince,
        "bandwatch_alarm_state_since_timestamp_seconds",
        "When the alarm entered its current state, in seconds since the Unix epoch.",
        MetricType::GAUGE,
        &["channel", "band"],
    ),
    (
        Fixed::AlarmTransitions,
        "bandwatch_alarm_transitions_total",
        "Alarm transitions, by the state entered.",
        MetricType::COUNTER,
        &["channel", "band", "to"],
    ),
    (
        Fixed::HealthOk,
        "bandwatch_channel_health_ok",
        "1 when the channel's sensor looks healthy (its alarms are armed), 0 when not OK.",
        MetricType::GAUGE,
        &["channel"],
    ),
    (
        Fixed::AlarmRecordsWritten,
        "bandwatch_alarm_records_written_total",
        "Journal events, captures and baselines written to the storage directory.",
        MetricType::COUNTER,
        &["kind"],
    ),
    (
        Fixed::AlarmRecordsDropped,
        "bandwatch_alarm_records_dropped_total",
        "Journal events, captures and baselines dropped because the alarm I/O queue was full.",
        MetricType::COUNTER,
        &["kind"],
    ),
    (
        Fixed::AlarmWriteErrors,
        "bandwatch_alarm_write_errors_total",
        "Failed writes of the journal, captures or baselines (see the log).",
        MetricType::COUNTER,
        &[],
    ),
    (
        Fixed::AlarmCapturesPruned,
        "bandwatch_alarm_captures_pruned_total",
        "Old captures removed to keep within the retention limits.",
        MetricType::COUNTER,
        &[],
    ),
    (
        Fixed::AlarmLimitDimensionless,
        "bandwatch_alarm_limit",
        "Limit of an alarm on a dimensionless value (crest factor), by level.",
        MetricType::GAUGE,
        &["channel", "band", "level"],
    ),
    (
        Fixed::StorageWriteErrors,
        "bandwatch_storage_write_errors_total",
        "Failed write attempts of journal events, captures or baselines, retried or not (see the log).",
        MetricType::COUNTER,
        &["kind"],
    ),
    (
        Fixed::StorageWriteRetries,
        "bandwatch_storage_write_retries_total",
        "Writes tried again after a failure that can pass (too many open files, disk full, I/O error, directory gone).",
        MetricType::COUNTER,
        &["kind"],
    ),
    (
        Fixed::StorageRecordsLost,
        "bandwatch_storage_records_lost_total",
        "Journal events, captures or baselines given up after their retries; a lost capture is reported with its reason by the event API.",
        MetricType::COUNTER,
        &["kind"],
    ),
    (
        Fixed::AlarmTimeToLimit,
        "bandwatch_alarm_time_to_limit_seconds",
        "Seconds until the alarm's significant trend reaches its limit, by level (0: past it; absent: no significant trend toward it). Guidance, not a prediction.",
        MetricType::GAUGE,
        &["channel", "band", "level"],
    ),
    (
        Fixed::HistoryRecordsDropped,
        "bandwatch_history_records_dropped_total",
        "History records (a channel's interval of aggregates, or a spectrum) not written, by reason: queue_full (the writer could not keep up), write_error (the file could not be written). Each loss is a hole in the history.",
        MetricType::COUNTER,
        &["reason"],
    ),
    (
        Fixed::HistoryPointsWritten,
        "bandwatch_history_points_written_total",
        "Aggregate rows (one series over one interval) written to the history file.",
        MetricType::COUNTER,
        &[],
    ),
    (
        Fixed::HistorySpectraStored,
        "bandwatch_history_spectra_stored_total",
        "Spectra written to the history file, by why they were stored (interval, alarm, request).",
        MetricType::COUNTER,
        &["reason"],
    ),
    (
        Fixed::HistorySpectraDeleted,
        "bandwatch_history_spectra_deleted_total",
        "Stored spectra deleted by retention (age, or the file's max_mb).",
        MetricType::COUNTER,
        &[],
    ),
    (
        Fixed::HistoryWriteErrors,
        "bandwatch_history_write_errors_total",
        "Failed opens, transactions or retention passes of the history file (see the log).",
        MetricType::COUNTER,
        &[],
    ),
    (
        Fixed::HistoryQueued,
        "bandwatch_history_queue_records",
        "History records waiting for the writer thread.",
        MetricType::GAUGE,
        &[],
    ),
    (
        Fixed::HistoryFileBytes,
        "bandwatch_history_file_bytes",
        "Bytes of the history file's pages in use, at the last retention pass.",
        MetricType::GAUGE,
        &[],
    ),
];

/// Time-domain levels exported per channel, in the order of the four
/// consecutive families a quantity gets.
pub(crate) const OVERALL: [(&str, &str); 4] = [
    ("mean", "Mean of the newest block"),
    ("rms", "RMS about the mean of the newest block"),
    (
        "peak",
        "Largest excursion from the mean in the newest block",
    ),
    ("peak_to_peak", "Maximum minus minimum of the newest block"),
];

/// Name of a band value's family: `bandwatch_band_<measure>_<si unit>`.
pub(crate) fn band_family(measure: Measure, q: Quantity) -> String {
    format!("bandwatch_band_{}_{}", measure.as_str(), q.metric_suffix())
}

/// Help text of a band value's family.
pub(crate) fn band_help(measure: Measure, q: Quantity) -> String {
    match measure {
        Measure::Rms => format!(
            "RMS level of the band in the latest averaged spectrum, in {}.",
            si_words(q)
        ),
        Measure::Peak => format!(
            "Peak amplitude of the largest line of the band in the latest averaged spectrum, in {}.",
            si_words(q)
        ),
    }
}

pub(crate) fn si_words(q: Quantity) -> &'static str {
    match q {
        Quantity::Displacement => "metres",
        Quantity::Velocity => "metres per second",
        Quantity::Acceleration => "metres per second squared",
        Quantity::Voltage => "volts",
        Quantity::Current => "amperes",
        Quantity::Pressure => "pascals",
    }
}

#[cfg(test)]
pub(crate) fn fixed_order() -> Vec<usize> {
    FIXED.iter().map(|(f, ..)| *f as usize).collect()
}
