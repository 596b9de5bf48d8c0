-- Record one warning found while staging a wave.
insert into problems (wave, rule, severity, column_name, value, count, examples, message, recorded_at)
values ($wave, $rule, $severity, $column_name, $value, $count, $examples, $message, $recorded_at)
