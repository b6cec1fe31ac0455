; JavaScript units. Arrow functions and function expressions count when bound
; to a name; the binding (declarator, assignment, field, key) is the unit's
; node so its JSDoc is found. Anonymous callbacks are not captured.
(function_declaration name: (identifier) @name) @function
(generator_function_declaration name: (identifier) @name) @function
(method_definition name: (_) @name) @function
(class_declaration name: (_) @name) @class

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
; an object literal bound to a variable qualifies the functions inside it
(variable_declarator name: (identifier) @name value: (object)) @scope

; a named function expression anywhere (a named callback, a returned closure)
; is a unit by its own name; one bound to a name is the binding's (javascript.py)
(function_expression name: (identifier) @name) @function
(generator_function name: (identifier) @name) @function

(assignment_expression
  left: (member_expression property: (property_identifier))
  right: [(arrow_function) (function_expression) (generator_function)]) @function
(field_definition
  property: [(property_identifier) (private_property_identifier)] @name
  value: [(arrow_function) (function_expression)]) @function
(pair
  key: [(property_identifier) (string)] @name
  value: [(arrow_function) (function_expression) (generator_function)]) @function

; export default function () {} / export default class {}: named "default"
(export_statement value: [(function_expression) (arrow_function)] @function)
(export_statement value: (class) @class)
