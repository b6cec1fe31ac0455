; TypeScript / TSX units (same query for both grammars): the JavaScript ones,
; plus interfaces and their method signatures, abstract classes and methods,
; enums, and namespaces as scopes. Overload signatures are not captured.
(function_declaration name: (identifier) @name) @function
(generator_function_declaration name: (identifier) @name) @function
(method_definition name: (_) @name) @function
(abstract_method_signature name: (_) @name) @function
(interface_body (method_signature name: (_) @name) @function)
(class_declaration name: (_) @name) @class
(abstract_class_declaration name: (_) @name) @class
(interface_declaration name: (_) @name) @class
(enum_declaration name: (_) @name) @class
(internal_module name: [(identifier) (nested_identifier)] @name) @scope

(variable_declarator
  name: (identifier) @name
  value: [(arrow_function) (function_expression) (generator_function)]) @function
(variable_declarator name: (identifier) @name value: (class)) @class
(variable_declarator
  name: (identifier) @name
  value: (call_expression
    function: (_) @wrapper
    arguments: (arguments [(arrow_function) (function_expression)]))
  (#match? @wrapper "^(React\\.)?(memo|forwardRef)$")) @function
(variable_declarator name: (identifier) @name value: (object)) @scope

; a named function expression anywhere (a named callback, a returned closure)
; is a unit by its own name; one bound to a name is the binding's (javascript.py)
(function_expression name: (identifier) @name) @function
(generator_function name: (identifier) @name) @function

(assignment_expression
  left: (member_expression property: (property_identifier))
  right: [(arrow_function) (function_expression) (generator_function)]) @function
(public_field_definition
  name: [(property_identifier) (private_property_identifier)] @name
  value: [(arrow_function) (function_expression)]) @function
(pair
  key: [(property_identifier) (string)] @name
  value: [(arrow_function) (function_expression) (generator_function)]) @function

(export_statement value: [(function_expression) (arrow_function)] @function)
(export_statement value: (class) @class)
