-- A column the spec gained since the responses table was created.
alter table responses add column {{ column|ident }} {{ type }}
