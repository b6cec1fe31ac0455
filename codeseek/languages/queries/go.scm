; Go units: functions, methods, and named struct or interface types.
(function_declaration name: (identifier) @name) @function
(method_declaration name: (field_identifier) @name) @function
(type_spec name: (type_identifier) @name type: [(struct_type) (interface_type)]) @class
