; Go units: functions, methods, named struct and interface types, and the
; method specs of a named interface (methods of that interface). Function
; literals and anonymous interface types are not captured.
(function_declaration name: (identifier) @name) @function
(method_declaration name: (field_identifier) @name) @function
(type_spec name: (type_identifier) @name type: [(struct_type) (interface_type)]) @class
(type_spec type: (interface_type (method_elem name: (field_identifier) @name) @function))
